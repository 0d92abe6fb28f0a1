"""Two real gloo processes: the fused path whose bucket all-reduces start from backward
hooks (train/overlap.py) against the same path synced after backward, step by step.

Both sum the same buckets of the same flat gradient over the same processes, so
everything must agree to the bit: parameters, loss, gradient norm, noise-scale and
layer statistics, the loss scale and its skipped steps. Each case builds two Trainers
from one config in the same two processes and takes the overlap away from one.
"""

import os
from datetime import timedelta

import pytest
import torch
import torch.distributed as dist

from conftest import make_config, spawn_ranks

STEPS = 4
BASE = ("layout.workers=4", "layout.procs=2", "layout.backend=gloo", "train.grads=fused", "train.progress=false")
CASES = {
    # Tiny buckets (256 floats): parameters straddle bucket edges and many calls are in flight;
    # two micro-batches (the hooks copy, then add); clipping that bites; a noise-scale step
    # (vmap path, plain sync) every other step and layer statistics on every step.
    "teacher": ("task=teacher", "layout.micro_batch=8", "layout.accum=2", "sync.bucket_kib=1", "optim.clip_norm=0.05",
                "telemetry.noise_every=2", "telemetry.layer_every=1"),
    # fp16 autocast with a loss scale of 2^20, which overflows fp16's gradients: the first step overflows and are
    # skipped after the all-reduce, then the scale backs off to 2^10 and steps apply.
    "digits fp16": ("task=digits", "layout.micro_batch=8", "train.precision=fp16", "train.scaler.start=1048576.0",
                    "train.scaler.shrink=0.0009765625", "telemetry.noise_every=0"),
}



def _run(rank, port, out_dir):
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE="2")
    torch.set_num_threads(1)
    from scaledrill.dist.gloo import GlooCollective
    from scaledrill.train.engine import Trainer

    coll = GlooCollective(timedelta(seconds=120))
    result = {}
    for name, overrides in CASES.items():
        cfg = make_config(*BASE, *overrides)
        overlapped, plain = Trainer(cfg, coll), Trainer(cfg, coll)
        assert overlapped.overlap is not None
        plain.overlap = None  # the same fused path, synced after backward
        early = []  # at each bucket's start: how many parameter-bucket pairs backward had still to finish
        starts = overlapped.overlap.starts
        start = starts._start
        starts._start = lambda: (early.append(sum(starts.missing)), start())[1]
        runs = {}
        for label, trainer in (("overlapped", overlapped), ("plain", plain)):
            records = [trainer.step() for _ in range(STEPS)]
            runs[label] = {
                "params": [p.detach().clone() for p in trainer.params],
                "records": [(r.loss, r.grad_norm, r.small_sq, r.big_sq, r.skipped, r.layers, r.precision) for r in records],
            }
        runs["early"] = early
        result[name] = runs
    torch.save(result, os.path.join(out_dir, f"rank{rank}.pt"))
    dist.barrier()
    coll.close()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    return spawn_ranks(_run, tmp_path_factory.mktemp("overlap"))


@pytest.mark.parametrize("case", list(CASES))
def test_overlap_gives_the_same_bits(runs, case):
    for rank in range(2):
        got = runs[rank][case]
        for mine, ref in zip(got["overlapped"]["params"], got["plain"]["params"], strict=True):
            assert torch.equal(mine, ref)
        assert repr(got["overlapped"]["records"]) == repr(got["plain"]["records"])  # repr: exact floats, and NaN == NaN
    assert all(torch.equal(a, b) for a, b in zip(runs[0][case]["overlapped"]["params"], runs[1][case]["overlapped"]["params"]))


def test_buckets_start_while_backward_still_runs(runs):
    early = runs[0]["teacher"]["early"]
    assert len(early) >= 2 * 27  # 2 overlapped steps of >= 27 buckets (6,920 floats in 256-float buckets)
    assert max(early) > 0  # some bucket went out before backward had finished the others


def test_skipped_and_clipped_steps_were_exercised(runs):
    fp16 = runs[0]["digits fp16"]["plain"]["records"]
    assert any(r[4] for r in fp16) and not all(r[4] for r in fp16)  # some steps skipped on overflow, some applied
    teacher = runs[0]["teacher"]["plain"]["records"]
    assert all(r[1] > 0.05 for r in teacher)  # every gradient norm above optim.clip_norm: the clip scaled them
    assert teacher[0][2] is not None and teacher[1][2] is None  # the noise scale on even steps only
