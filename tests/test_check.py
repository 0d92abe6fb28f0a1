"""scaledrill check: the reference is the true batch, correct recipes match on every path, the check can fail."""

import json

import pytest
import torch
import torch.nn.functional as F

from conftest import make_config
from scaledrill.check.reference import reference
from scaledrill.check.tolerance import C, Tolerance
from scaledrill.commands.check import check_verb
from scaledrill.layout import Layout
from scaledrill.tasks.digits import DigitsData, DigitsNet
from scaledrill.tasks.sampler import Sampler

DIGITS = ("task=digits", "task.model.width=4", "layout.workers=4", "layout.micro_batch=8", "layout.accum=2")
TEACHER = ("task=teacher", "task.model.hidden=32", "layout.workers=4", "layout.micro_batch=8", "layout.accum=2")
IN_PROCESS = "check.paths=[accumulation,fused,vmap,loop]"


def test_reference_gradient_is_plain_float64_autograd_over_the_whole_batch():
    cfg = make_config(*DIGITS, "check.steps=1", name="check")
    ref = reference(cfg, steps=1, batchnorm="worker")
    # Ground truth: plain single-process torch autograd in float64, written out here with torch's own
    # BatchNorm (F.batch_norm) on each group of b = 8 consecutive samples of the worker-major global batch.
    torch.manual_seed(0)
    net = DigitsNet(width=4).double()
    data = DigitsData()
    index = Sampler(data.train.size, Layout(4, 1, 8, 2, "local"), 0).global_batch(0)
    x, y = data.train.take(index)["input"].double(), data.train.take(index)["target"]
    h = x
    for layer in net.features:
        if hasattr(layer, "running_mean"):
            groups = [F.batch_norm(g, None, None, layer.weight, layer.bias, training=True, eps=layer.eps) for g in h.split(8)]
            h = torch.cat(groups)
        else:
            h = layer(h)
    loss = F.cross_entropy(net.head(h.flatten(1)), y, reduction="sum") / 64
    truth = torch.autograd.grad(loss, list(net.parameters()))
    for name, mine, want in zip(ref.names, ref.grads, truth):
        assert torch.allclose(mine, want, rtol=0, atol=1e-13), name


def test_tolerance_rule_is_the_stated_formula():
    tol = Tolerance(unit=2.0**-24, batch=64, scale=1.0)
    assert tol(0.5) == pytest.approx(C * 2.0**-24 * 8 * 0.5)  # C·u·√B·scale
    assert tol(0.5, steps=3) == pytest.approx(3 * tol(0.5))  # grows linearly with the step count


@pytest.mark.parametrize("task", [DIGITS, TEACHER], ids=["digits-batchnorm", "teacher-mlp"])
def test_correct_recipe_matches_the_true_batch_on_every_path(task, tmp_path):
    result = check_verb(make_config(*task, IN_PROCESS, "check.steps=3", name="check"), tmp_path)
    report = json.loads((tmp_path / "check.json").read_text())
    assert result.exit_code == 0 and report["verdict"] == "match"
    assert [p["name"] for p in report["paths"]] == ["accumulation", "workers:fused", "workers:vmap", "workers:loop"]
    for path in report["paths"]:
        # Against the float64 plain-autograd reference: float32 rounding only, far below 1e-4 relative.
        assert all(layer["max_rel"] < 1e-4 and layer["max_abs"] <= layer["tolerance"] for layer in path["layers"])
        assert path["trajectory"]["steps"] == 3 and path["trajectory"]["max_abs"] <= path["trajectory"]["tolerance"]
        assert any(layer["max_abs"] > 0 for layer in path["layers"])  # float32 really differs from float64
    assert report["diagnosis"] == []


def test_a_tiny_tolerance_scale_makes_the_same_recipe_fail(tmp_path):
    cfg = make_config(*TEACHER, "check.paths=[accumulation]", "check.steps=2", "check.tolerance_scale=1e-6", name="check")
    result = check_verb(cfg, tmp_path)
    report = json.loads((tmp_path / "check.json").read_text())
    assert result.exit_code == 1 and report["verdict"] == "mismatch"
    layers = report["paths"][0]["layers"]
    assert any(layer["max_abs"] > layer["tolerance"] for layer in layers)  # float32 vs float64 rounding, held to 1e-6 of the rule
    assert report["diagnosis"][0]["cause"] == "the tolerance is set below float rounding"


def test_float64_paths_match_to_float64_rounding(tmp_path):
    cfg = make_config(*TEACHER, "check.paths=[accumulation,vmap]", "check.steps=2", "train.dtype=float64", name="check")
    result = check_verb(cfg, tmp_path)
    report = json.loads((tmp_path / "check.json").read_text())
    assert result.exit_code == 0
    # The float64 reference (plain autograd) and the float64 engine differ only by summation order.
    assert max(layer["max_rel"] for p in report["paths"] for layer in p["layers"]) < 1e-12
