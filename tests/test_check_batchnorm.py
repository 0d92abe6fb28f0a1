"""check.batchnorm=global: the paths that can train with train.batchnorm=global are compared with
BatchNorm over the whole global batch; the others are skipped, or the check refuses, saying why.

Ground truth: the check's float64 reference. Its global mode is proved here against
torch's own F.batch_norm over all B samples (as its per-worker mode is in tests/test_check.py).
"""

import json

import pytest
import torch
import torch.nn.functional as F
from omegaconf import OmegaConf

from conftest import make_config
from scaledrill.check.paths import variant
from scaledrill.check.processes import run_processes
from scaledrill.check.reference import reference
from scaledrill.check.runner import Runner
from scaledrill.check.settings import read_settings
from scaledrill.check.tolerance import Tolerance, compare
from scaledrill.commands.check import check_verb
from scaledrill.errors import ConfigError
from scaledrill.layout import Layout
from scaledrill.tasks.digits import DigitsData, DigitsNet
from scaledrill.tasks.sampler import Sampler

# k = 1: train.batchnorm=global normalises all W·b = B = 16 samples of the step at once
DIGITS = ("task=digits", "task.model.width=4", "layout.workers=4", "layout.micro_batch=4", "layout.accum=1",
          "check.steps=2", "check.batchnorm=global")


def check_config(*overrides):
    return make_config(*DIGITS, *overrides, name="check")


def test_global_reference_is_torch_batchnorm_over_the_whole_batch():
    ref = reference(check_config(), steps=1, batchnorm="global")
    # Plain float64 torch autograd with torch's F.batch_norm over all B = 16 samples at once.
    torch.manual_seed(0)
    net = DigitsNet(width=4).double()
    data = DigitsData()
    batch = data.train.take(Sampler(data.train.size, Layout(4, 1, 4, 1, "local"), 0).global_batch(0))
    h = batch["input"].double()
    for layer in net.features:
        is_bn = hasattr(layer, "running_mean")
        h = F.batch_norm(h, None, None, layer.weight, layer.bias, training=True, eps=layer.eps) if is_bn else layer(h)
    loss = F.cross_entropy(net.head(h.flatten(1)), batch["target"], reduction="sum") / 16
    truth = torch.autograd.grad(loss, list(net.parameters()))
    for name, mine, want in zip(ref.names, ref.grads, truth):
        assert torch.allclose(mine, want, rtol=0, atol=1e-13), name


def test_two_gloo_processes_with_global_statistics_match_the_true_batch(tmp_path):
    cfg = check_config("check.paths=[fused,processes]", "check.backends=[gloo]")
    result = check_verb(cfg, tmp_path)
    report = json.loads((tmp_path / "check.json").read_text())
    assert result.exit_code == 0 and report["verdict"] == "match", report
    assert [p["name"] for p in report["paths"]] == ["workers:fused", "processes:gloo"]
    laid = OmegaConf.load(tmp_path / "processes-gloo" / "config.yaml")
    assert (laid.layout.procs, laid.train.batchnorm) == (2, "global")  # the processes really trained with it
    for path in report["paths"]:
        assert all(x["max_abs"] <= x["tolerance"] for x in path["layers"])
        assert path["trajectory"]["max_abs"] <= path["trajectory"]["tolerance"]

    # The same 2 processes with per-worker statistics: the comparison tells them apart.
    per_worker = run_processes(variant(cfg, **{"train.batchnorm": "worker"}), "gloo", 2, tmp_path / "per-worker")
    tol = Tolerance.for_run(cfg, 1.0)
    against_true = compare("per-worker", per_worker, reference(cfg, 2, batchnorm="global"), tol)
    assert not against_true.ok
    assert max(x.max_abs / x.tolerance for x in against_true.layers) > 100  # far beyond rounding, not at its edge
    assert compare("per-worker", per_worker, reference(cfg, 2, batchnorm="worker"), tol).ok  # and right for what it computes


def test_accumulation_is_refused_before_anything_runs(tmp_path):
    cfg = check_config("layout.accum=2")
    with pytest.raises(ConfigError) as err:
        check_verb(cfg, tmp_path / "run")
    assert err.value.key == "check.batchnorm"
    assert "layout.accum=2" in err.value.rule and "B = W·b·k = 32" in err.value.rule and "W·b = 16" in err.value.rule
    assert not (tmp_path / "run").exists()  # refused before the reference or any process


def plan(cfg, tmp_path):
    return Runner(cfg, read_settings(cfg), tmp_path).plan()


def test_paths_that_cannot_see_the_whole_batch_are_skipped_with_the_reason(tmp_path):
    run, skipped = plan(check_config("check.paths=[accumulation,fused,vmap,loop,processes]", "check.backends=[gloo]",
                                     "train.grads=loop"), tmp_path)
    assert run == ["workers:fused"]
    assert set(skipped) == {"accumulation", "workers:vmap", "workers:loop", "processes:gloo"}
    assert all(why.startswith("check.batchnorm=global") for why in skipped.values())
    assert "micro-batches of b = 4" in skipped["accumulation"]
    assert "train.grads=vmap" in skipped["workers:vmap"]
    assert "train.grads=loop" in skipped["processes:gloo"]  # the recipe's own path, which the processes use


def test_nothing_left_to_compare_is_refused(tmp_path):
    with pytest.raises(ConfigError) as err:
        plan(check_config("check.paths=[vmap,loop]"), tmp_path)
    assert err.value.key == "check.batchnorm" and "workers:vmap: check.batchnorm=global" in err.value.rule
    with pytest.raises(ConfigError) as err:  # a custom step's thread-workers normalise alone
        plan(check_config("+check.step._target_=tests.fixtures_check.good_step"), tmp_path)
    assert err.value.key == "check.batchnorm" and "check.step" in err.value.rule


def test_a_recipe_with_global_statistics_needs_the_global_reference(tmp_path):
    with pytest.raises(ConfigError) as err:
        plan(check_config("check.batchnorm=worker", "train.batchnorm=global"), tmp_path)
    assert err.value.key == "check.batchnorm" and "train.batchnorm=global" in err.value.rule


def test_a_model_without_batchnorm_runs_every_path(tmp_path):
    cfg = make_config("task=teacher", "task.model.hidden=16", "layout.workers=4", "layout.micro_batch=4", "layout.accum=2",
                      "check.batchnorm=global", "check.paths=[accumulation,fused,vmap,loop]", name="check")
    run, skipped = plan(cfg, tmp_path)  # no BatchNorm: both settings compute the same, nothing to refuse
    assert run == ["accumulation", "workers:fused", "workers:vmap", "workers:loop"] and skipped == {}


def test_a_batchnorm_that_ignores_the_global_setting_is_named(tmp_path):
    cfg = check_config("task.model._target_=tests.fixtures_check.PerGroupOnlyDigitsNet", "check.paths=[fused]")
    result = check_verb(cfg, tmp_path)
    report = json.loads((tmp_path / "check.json").read_text())
    assert result.exit_code == 1
    assert max(x["max_rel"] for x in report["paths"][0]["layers"]) > 1e-3  # statistics of 4 samples, not 16
    finding = report["diagnosis"][0]
    assert finding["cause"].startswith("BatchNorm statistics: the path trained with train.batchnorm=global")
    assert "workers:fused match the reference with per-worker statistics" in finding["evidence"]
