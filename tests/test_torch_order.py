"""train.order=torch_distributed against torch's own DistributedSampler and DataLoader (the outside check)."""

import itertools

import pytest
import torch
from omegaconf import OmegaConf
from torch.utils.data import DataLoader, DistributedSampler

from scaledrill.config.rules import check_train
from scaledrill.errors import ConfigError, DataError
from scaledrill.layout import Layout
from scaledrill.tasks.torch_order import DistributedOrder


def torch_batches(size, W, rank, b, seed, epoch, shuffle, drop_last):
    """What rank `rank` of a plain DDP script gets in `epoch`: lists of b indices, full batches only."""
    sampler = DistributedSampler(range(size), num_replicas=W, rank=rank, shuffle=shuffle, seed=seed, drop_last=drop_last)
    sampler.set_epoch(epoch)
    return [batch.tolist() for batch in DataLoader(range(size), batch_size=b, sampler=sampler, drop_last=True)]


CASES = list(itertools.product((1, 2, 3, 8), (0, 17), (100, 203), (False, True), (True, False)))


@pytest.mark.parametrize("W, seed, size, drop_last, shuffle", CASES)
def test_each_worker_sees_its_ranks_batches(W, seed, size, drop_last, shuffle):
    b, k = 4, 2
    order = DistributedOrder(size, Layout(W, 1, b, k, "local"), seed, shuffle=shuffle, drop_last=drop_last)
    for epoch in (0, 1, 3):
        expected = {w: torch_batches(size, W, w, b, seed, epoch, shuffle, drop_last) for w in range(W)}
        steps = len(expected[0]) // k
        assert order.steps_per_epoch == steps
        for within in range(steps):
            got = order.worker_batches(epoch * steps + within, range(W))  # [k, W, b]
            for w in range(W):
                for m in range(k):  # accumulation over consecutive batches
                    assert got[m, w].tolist() == expected[w][within * k + m]


def test_a_process_slice_is_the_same_as_the_whole():
    order = DistributedOrder(203, Layout(8, 4, 4, 1, "gloo"), 5)
    for step in (0, 6, 13):
        whole = order.worker_batches(step, range(8))
        assert torch.equal(torch.cat([order.worker_batches(step, range(r * 2, r * 2 + 2)) for r in range(4)], dim=1), whole)
        assert torch.equal(order.global_batch(step).view(8, 1, 4).transpose(0, 1), whole)


def test_config_and_size_errors():
    train = OmegaConf.create({"seed": 0, "tail": "drop", "order": "torch_distributed", "torch_sampler": {"shuffle": "yes"}})
    with pytest.raises(ConfigError) as err:  # config/rules.py, before make_sampler
        check_train(train)
    assert err.value.key == "train.torch_sampler.shuffle"
    with pytest.raises(ConfigError) as err:
        check_train(OmegaConf.create({"seed": 0, "tail": "drop", "order": "ddp"}))
    assert err.value.key == "train.order"
    with pytest.raises(DataError) as err:  # 30 samples over 8 ranks: 4 each, one batch of 4, no step of k=2 batches
        DistributedOrder(30, Layout(8, 1, 4, 2, "local"), 0)
    assert "4 per worker" in str(err.value)
    assert DistributedOrder(30, Layout(8, 1, 4, 1, "local"), 0).steps_per_epoch == 1
