"""Layout invariance of the sync layer: W = 8 workers on P = 1 vs P = 2 gloo processes.

The per-worker gradients are fixed functions of (step, global worker id); random
compressors draw from (seed, step, worker id). Only the order of summation may
differ between layouts (8 rows at once vs 4 + 4 across processes).
"""

import os
from datetime import timedelta

import pytest
import torch
import torch.distributed as dist

from conftest import spawn_ranks
from scaledrill.dist import LocalCollective
from scaledrill.dist.gloo import GlooCollective
from scaledrill.layout import Layout
from scaledrill.sync import build_sync
from scaledrill.sync.compress import NAMES

W, STEPS = 8, 4
SHAPES = [torch.Size([12, 10]), torch.Size([10]), torch.Size([6, 5])]  # n = 160
CONFIGS = [(name, ef) for name in NAMES for ef in (False, True)]
TINY = 400 / 2**10  # 100 float32 per bucket: several buckets per all-reduce


def grads(step: int, workers: range) -> torch.Tensor:
    rows = []
    for w in workers:
        gen = torch.Generator().manual_seed(1000 * step + w)
        rows.append(torch.randn(160, generator=gen, dtype=torch.float64) * (1 + w))
    return torch.stack(rows)


def cfg(name, ef):
    return {"name": name, "error_feedback": ef, "fraction": 0.1, "rank": 2, "exact_until": 0, "levels": 4, "bucket_kib": TINY}


def run(layout, collective, rank):
    me = layout.worker_ids(rank)
    res = {}
    for name, ef in CONFIGS:
        sync = build_sync(cfg(name, ef), layout, SHAPES, collective, seed=5, dtype=torch.float64)
        outs = []
        for step in range(STEPS):
            g = grads(step, me)
            outs.append(sync.reduce(g if sync.per_worker else g.sum(0, keepdim=True), me, step))
        res[(name, ef)] = (torch.stack(outs), sync.state_dict())
    return res


def _child(rank, port, out_dir):
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE="2")
    torch.set_num_threads(1)
    coll = GlooCollective(timedelta(seconds=60))
    res = run(Layout(W, 2, 1, 1, "gloo"), coll, rank)
    torch.save(res, os.path.join(out_dir, f"rank{rank}.pt"))
    dist.barrier()
    coll.close()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    two = spawn_ranks(_child, tmp_path_factory.mktemp("layout"))
    return run(Layout(W, 1, 1, 1, "local"), LocalCollective(), 0), two


# Tolerance relative to the largest entry. float64: a sum of 8 terms in another order differs
# by a few units of 2^-53. fp16/bf16 sum in the narrow type: the two layouts round partial
# sums differently, up to ~3 unit roundoffs (2^-11, 2^-8), so 2^-8 and 2^-5.
TOL = {"fp16": 2.0**-8, "bf16": 2.0**-5}


@pytest.mark.parametrize("name,ef", CONFIGS)
def test_one_process_equals_two(runs, name, ef):
    one, two = runs
    want, state = one[(name, ef)]
    got = two[0][(name, ef)][0]
    assert torch.equal(got, two[1][(name, ef)][0])  # identical on every process
    tol = TOL.get(name, 1e-12)
    assert (got - want).abs().max() <= tol * want.abs().max()
    if ef:  # each process holds its own workers' residual rows, in worker order
        split = torch.cat([two[r][(name, ef)][1]["worker.residual"] for r in range(2)])
        scale = state["worker.residual"].abs().max() + 1
        assert (split - state["worker.residual"]).abs().max() <= max(tol, 1e-9) * scale
