"""Global BatchNorm statistics (train.batchnorm=global) over all W·b samples of a micro-step.

The outside reference is torch's own nn.BatchNorm2d in train mode (Ioffe & Szegedy
2015) over the whole batch, the behaviour torch's SyncBatchNorm gives across ranks.
"""

import copy
import os

import pytest
import torch
import torch.multiprocessing as mp

from conftest import make_config
from scaledrill.config.validate import validate_run
from scaledrill.dist import LocalCollective
from scaledrill.dist.launch import free_port
from scaledrill.errors import ConfigError
from scaledrill.nn import GhostBatchNorm
from scaledrill.nn.ghost_bn import set_global_statistics
from test_ghost_bn import _torch_bn


def test_global_statistics_equal_torch_batchnorm_over_the_whole_batch():
    V, b, C = 4, 6, 3
    gen = torch.Generator().manual_seed(1)
    x = 3 * torch.randn(V * b, C, 5, 5, generator=gen, dtype=torch.float64) + 2
    upstream = torch.randn(V * b, C, 5, 5, generator=gen, dtype=torch.float64)

    reference = _torch_bn(C).double()  # torch's BatchNorm2d over all V·b samples: the outside reference
    ghost = GhostBatchNorm(C, group_size=b).double()  # per-worker groups, overridden by the global setting
    ghost.load_state_dict(copy.deepcopy(reference.state_dict()))
    assert set_global_statistics(ghost, LocalCollective()) == 1

    outs, grads = [], []
    for module in (reference, ghost):
        xi = x.clone().requires_grad_(True)
        out = module(xi)
        gx, gw, gb = torch.autograd.grad((out * upstream).sum(), (xi, module.weight, module.bias))
        outs.append(out.detach())
        grads.append((gx, gw, gb))

    # float64: both compute the same two reductions over 150 values per channel; 1e-10 is rounding only
    torch.testing.assert_close(outs[1], outs[0], rtol=0, atol=1e-10)
    for mine, theirs in zip(grads[1], grads[0]):
        torch.testing.assert_close(mine, theirs, rtol=0, atol=1e-10)
    torch.testing.assert_close(ghost.running_mean, reference.running_mean, rtol=0, atol=1e-12)
    torch.testing.assert_close(ghost.running_var, reference.running_var, rtol=0, atol=1e-12)
    assert int(ghost.num_batches_tracked) == 1

    # and the per-worker groups really are something else (so the comparison can fail)
    set_global_statistics(ghost, None)
    assert (ghost(x) - outs[0]).abs().max() > 1e-3


# -- real processes ------------------------------------------------------------
STEPS = 3
RECIPE = ("task=digits", "layout.workers=4", "layout.micro_batch=8", "layout.accum=2", f"train.steps={STEPS}",
          "train.progress=false", "train.eval_every=0", "telemetry.noise_every=0")

# float32: 2 processes change only summation order: each BatchNorm sum (count, Σx,
# Σ(x-mean)² over ≤ 4·8·64 = 2048 values per channel) and each gradient sum is split
# into two partial sums that are then added. A reordered float32 sum of n terms moves
# by at most ~n·u relative (u = 2^-24), typically ~sqrt(n)·u ≈ 3e-6 since rounding
# errors are random; 3 SGD steps of 2 micro-steps carry that into the parameters
# scaled by the learning rate, so 1e-5·max|θ| is a safe bound (measured: ~3e-8),
# while per-worker statistics move the parameters by ~5e-3·max|θ|.
RTOL = 1e-5


def _state(trainer) -> torch.Tensor:
    """Parameters and running statistics, flat, in float64."""
    return torch.cat([v.detach().double().reshape(-1) for v in trainer.model.state_dict().values() if v.is_floating_point()])


def _train(cfg, collective) -> torch.Tensor:
    from scaledrill.train.engine import Trainer

    trainer = Trainer(cfg, collective)
    for _ in range(STEPS):
        trainer.step()
    return _state(trainer)


def _rank(rank, port, container, out_dir):
    from datetime import timedelta

    from omegaconf import OmegaConf

    from scaledrill.dist.gloo import GlooCollective

    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE="2")
    torch.set_num_threads(1)
    collective = GlooCollective(timedelta(seconds=60))
    try:
        torch.save(_train(OmegaConf.create(container), collective), f"{out_dir}/rank{rank}.pt")
        collective.barrier()  # neither rank tears down while the other still talks
    finally:
        collective.close()



def test_two_gloo_processes_equal_one_process_with_global_statistics(tmp_path):
    from omegaconf import OmegaConf

    two_procs = make_config(*RECIPE, "train.batchnorm=global", "layout.backend=gloo", "layout.procs=2")
    mp.spawn(_rank, args=(free_port(), OmegaConf.to_container(two_procs, resolve=True), str(tmp_path)), nprocs=2)
    ranks = [torch.load(tmp_path / f"rank{r}.pt") for r in range(2)]
    one = _train(make_config(*RECIPE, "train.batchnorm=global"), LocalCollective())
    per_worker = _train(make_config(*RECIPE, "train.batchnorm=worker"), LocalCollective())

    torch.testing.assert_close(ranks[1], ranks[0], rtol=0, atol=0)  # running statistics included: the same everywhere
    scale = float(one.abs().max())
    gap = float((ranks[0] - one).abs().max()) / scale
    assert gap <= RTOL, gap
    assert float((per_worker - one).abs().max()) / scale > 100 * RTOL  # the comparison can tell the two apart


# -- configuration errors ------------------------------------------------------
def test_bad_value_names_the_key():
    cfg = make_config("train.batchnorm=everyone")
    with pytest.raises(ConfigError) as err:
        validate_run(cfg)
    assert err.value.key == "train.batchnorm"
    assert "worker or global" in str(err.value)


@pytest.mark.parametrize("overrides, why", [
    (("train.grads=vmap",), "train.grads=vmap"),
    (("train.grads=loop",), "train.grads=loop"),
    (("sync=topk",), "sync=topk"),
    (("sync.bitwise=true",), "sync.bitwise=true"),
    (("sync.error_feedback=true",), "sync=exact with error_feedback"),
])
def test_global_needs_the_fused_path(overrides, why):
    cfg = make_config("task=digits", "train.batchnorm=global", *overrides)
    with pytest.raises(ConfigError) as err:
        validate_run(cfg)  # before any process starts
    assert err.value.key == "train.batchnorm"
    assert why in str(err.value) and "fused gradient path" in str(err.value)


@pytest.mark.parametrize("overrides, why", [
    (("train.grads=vmap",), "train.grads=vmap"),
    (("sync=powersgd",), "sync=powersgd"),
    (("sync.bitwise=true",), "sync.bitwise=true"),
])
def test_the_engine_refuses_global_on_a_per_worker_path(overrides, why):
    from scaledrill.train.engine import Trainer

    cfg = make_config("task=digits", "train.batchnorm=global", *overrides)
    with pytest.raises(ConfigError) as err:
        Trainer(cfg, LocalCollective())
    assert err.value.key == "train.batchnorm"
    assert why in str(err.value)


def test_global_on_the_fused_path_is_accepted():
    from scaledrill.train.engine import Trainer

    cfg = make_config("task=digits", "train.batchnorm=global")
    validate_run(cfg)
    trainer = Trainer(cfg, LocalCollective())
    assert trainer.path == "fused"
    assert all(m.collective is not None for m in trainer.model.modules() if isinstance(m, GhostBatchNorm))
