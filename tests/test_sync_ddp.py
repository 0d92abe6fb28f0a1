"""Two gloo processes: our sync layer against torch's DistributedDataParallel and its hooks.

One spawn runs every comparison; each rank takes rank-dependent data so the
average is not trivial. W = P = 2, one worker per process, as DDP has.
"""

import copy
import os
from datetime import timedelta

import pytest
import torch
import torch.distributed as dist
from torch.distributed.algorithms.ddp_comm_hooks.default_hooks import bf16_compress_hook, fp16_compress_hook
from torch.distributed.algorithms.ddp_comm_hooks.powerSGD_hook import PowerSGDState, powerSGD_hook
from torch.nn.parallel import DistributedDataParallel as DDP

from conftest import spawn_ranks
from scaledrill.dist.gloo import GlooCollective
from scaledrill.layout import Layout
from scaledrill.sync import build_sync

STEPS = 25  # PowerSGD steps; the power iteration converges by (σ2/σ1)² = 1/4 per step



def mlp() -> torch.nn.Module:
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(6, 9), torch.nn.Tanh(), torch.nn.Linear(9, 3))


class Probe(torch.nn.Module):
    """Gradients equal the inputs, so the test chooses them exactly."""

    def __init__(self):
        super().__init__()
        self.weight = torch.nn.Parameter(torch.zeros(16, 24))
        self.bias = torch.nn.Parameter(torch.zeros(24))

    def forward(self, t, b):
        return (self.weight * t).sum() + (self.bias * b).sum()


def probe_grads(rank):
    """M̄ = U diag(8, 4, 2, 1, ...) Vᵀ with a clear gap; the two ranks differ by ±D."""
    gen = torch.Generator().manual_seed(11)
    u, _ = torch.linalg.qr(torch.randn(16, 16, generator=gen))
    v, _ = torch.linalg.qr(torch.randn(24, 16, generator=gen))
    mean = u @ torch.diag(8.0 / 2.0 ** torch.arange(16.0)) @ v.T
    d = 0.5 * torch.randn(16, 24, generator=gen)
    bias = torch.randn(24, generator=gen)
    sign = 1.0 if rank == 0 else -1.0
    return mean + sign * d, bias * (rank + 1), mean


def flat_grads(module) -> torch.Tensor:
    return torch.cat([p.grad.reshape(-1) for p in module.parameters()])


def _run(rank, port, out_dir):
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE="2")
    torch.set_num_threads(1)
    coll = GlooCollective(timedelta(seconds=60))
    layout = Layout(2, 2, 8, 1, "gloo")
    me = range(rank, rank + 1)
    res = {}
    gen = torch.Generator().manual_seed(100 + rank)
    x, y = torch.randn(8, 6, generator=gen), torch.randn(8, 3, generator=gen)
    # DDP refuses to register bf16_compress_hook off CUDA/NCCL by checking its name; gloo does
    # sum bf16 on CPU, so a wrapper runs torch's own hook code unchanged.
    def bf16_hook(state, bucket):
        return bf16_compress_hook(state, bucket)

    for name, hook in (("exact", None), ("fp16", fp16_compress_hook), ("bf16", bf16_hook)):
        model = mlp()
        ddp = DDP(copy.deepcopy(model))
        if hook is not None:
            ddp.register_comm_hook(None, hook)
        torch.nn.functional.mse_loss(ddp(x), y).backward()
        torch.nn.functional.mse_loss(model(x), y).backward()
        shapes = [p.shape for p in model.parameters()]
        sync = build_sync({"name": name}, layout, shapes, coll, seed=0)
        res[name] = (flat_grads(ddp.module), sync.reduce(flat_grads(model)[None], me, 0), flat_grads(model))
    # PowerSGD rank 1, no error feedback, warm start, exact before step 2 (torch's minimum).
    t, b, mean = probe_grads(rank)
    ddp = DDP(Probe())
    state = PowerSGDState(None, matrix_approximation_rank=1, start_powerSGD_iter=2, min_compression_rate=1,
                          use_error_feedback=False, warm_start=True)
    ddp.register_comm_hook(state, powerSGD_hook)
    cfg = {"name": "powersgd", "rank": 1, "exact_until": 2, "error_feedback": False}
    sync = build_sync(cfg, layout, [torch.Size([16, 24]), torch.Size([24])], coll, seed=0)
    theirs, ours, errors = [], [], []
    for step in range(STEPS):
        ddp.zero_grad()
        ddp(t, b).backward()
        theirs.append(flat_grads(ddp.module))
        ours.append(sync.reduce(torch.cat([t.reshape(-1), b])[None], me, step))
        errors.append(sync.stats["rel_error_to_exact"])
    res["powersgd"] = (torch.stack(theirs), torch.stack(ours), mean, errors)
    torch.save(res, os.path.join(out_dir, f"rank{rank}.pt"))
    dist.barrier()
    coll.close()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    return spawn_ranks(_run, tmp_path_factory.mktemp("ddp"))


def test_exact_equals_ddp(runs):
    for rank in range(2):
        ddp, ours, _ = runs[rank]["exact"]
        # torch DDP: gradients averaged over ranks. Halving is exact in binary, so the two
        # orders (g/2 + g'/2 vs (g + g')/2) agree to one float32 rounding (2^-23 relative).
        torch.testing.assert_close(ours, ddp, rtol=2**-23, atol=1e-30)
    assert not torch.equal(runs[0]["exact"][2], runs[1]["exact"][2])  # the ranks' data differ
    assert torch.equal(runs[0]["exact"][1], runs[1]["exact"][1])  # identical on every process


@pytest.mark.parametrize("name,unit", [("fp16", 2.0**-10), ("bf16", 2.0**-7)])
def test_cast_equals_torch_compress_hook(runs, name, unit):
    for rank in range(2):
        ddp, ours, local = runs[rank][name]
        # torch's fp16/bf16_compress_hook casts then halves; we halve then cast. Equal unless
        # the half is subnormal, so allow one ulp of the narrow type (relative `unit`).
        torch.testing.assert_close(ours, ddp, rtol=unit, atol=2.0**-24)
        assert (ours == ddp).float().mean() > 0.95
    exact = runs[0]["exact"][1]
    assert not torch.equal(runs[0][name][1], exact)  # the cast really rounded


def test_powersgd_matches_torch_hook(runs):
    theirs, ours, mean, errors = runs[0]["powersgd"]
    u, s, vt = torch.linalg.svd(mean)
    best = s[0] * torch.outer(u[:, 0], vt[0])  # Eckart–Young: the best rank-1 approximation
    cut = mean.numel()
    for got in (theirs, ours):
        # torch's powerSGD_hook and ours, both warm-started with no error feedback, run a
        # power iteration on M̄: error shrinks by (σ2/σ1)² = 1/4 per step, so after 23
        # compressed steps only float32 rounding remains (1e-5 relative stated).
        torch.testing.assert_close(got[-1, :cut].view(16, 24), best, rtol=0, atol=1e-5 * s[0].item())
        torch.testing.assert_close(got[0, :cut].view(16, 24), mean, rtol=0, atol=1e-5)  # step 0: exact
    # the 1-D bias goes uncompressed in both: the exact average, every step
    torch.testing.assert_close(ours[:, cut:], theirs[:, cut:], rtol=2**-23, atol=1e-30)
    # low-rank error statistic over the whole vector (the bias is exact, step 0 is the exact
    # average): both settle at ‖M̄ − best‖/‖exact‖ = √(Σ_{i≥2} σ_i²)/‖exact‖
    exact = ours[0]
    floor = float(s[1:].norm() / exact.norm())
    their_err = float((theirs[-1] - exact).norm() / exact.norm())
    assert errors[-1] == pytest.approx(floor, rel=1e-4)
    assert their_err == pytest.approx(floor, rel=1e-4)
    assert errors[2] > floor  # the first compressed step starts from a random Q
    assert torch.equal(runs[0]["powersgd"][1], runs[1]["powersgd"][1])
