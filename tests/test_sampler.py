import pytest
import torch

from scaledrill.errors import DataError
from scaledrill.layout import Layout
from scaledrill.tasks.sampler import Sampler


def _sampler(workers, procs, b=4, k=2, size=1000, tail="drop"):
    backend = "local" if procs == 1 else "gloo"
    return Sampler(size, Layout(workers, procs, b, k, backend), seed=3, tail=tail)


def test_worker_batches_do_not_depend_on_procs():
    one = _sampler(8, 1)
    for procs in (2, 4, 8):
        many = _sampler(8, procs)
        for step in (0, 5, 40):
            joined = torch.cat([many.worker_batches(step, many.layout.worker_ids(r)) for r in range(procs)], dim=1)
            assert torch.equal(joined, one.worker_batches(step, one.layout.worker_ids(0)))


def test_same_global_batch_for_accumulation_and_workers():
    # W=8, k=1 and W=1, k=8 with the same b see the same samples at every step.
    wide = Sampler(500, Layout(8, 1, 4, 1, "local"), seed=1)
    deep = Sampler(500, Layout(1, 1, 4, 8, "local"), seed=1)
    for step in range(20):
        assert torch.equal(wide.global_batch(step), deep.global_batch(step))


def test_drop_tail_covers_each_epoch_once_and_counts_dropped():
    s = _sampler(8, 1, b=4, k=2, size=1000)  # B = 64, 15 steps per epoch, 40 dropped
    epoch = torch.cat([s.global_batch(t) for t in range(15)])
    assert epoch.unique().numel() == 15 * 64
    assert s.dropped_samples(15) == 1000 - 15 * 64
    assert s.dropped_samples(31) == 2 * 40
    assert not torch.equal(s.global_batch(0), s.global_batch(15))  # a new order each epoch


def test_carry_tail_uses_every_sample():
    s = _sampler(8, 1, b=5, k=1, size=100, tail="carry")  # B = 40
    seen = torch.cat([s.global_batch(t) for t in range(5)])  # 200 positions = 2 epochs
    assert torch.equal(seen[:100].sort().values, torch.arange(100))
    assert torch.equal(seen[100:].sort().values, torch.arange(100))
    assert s.dropped_samples(5) == 0


def test_dataset_smaller_than_a_global_batch():
    with pytest.raises(DataError, match="fewer than one global batch"):
        _sampler(8, 1, b=16, k=1, size=100)


def test_stream_indices_are_positions():
    s = _sampler(4, 1, b=2, k=1, size=None)
    assert torch.equal(s.global_batch(3), torch.arange(24, 32))
