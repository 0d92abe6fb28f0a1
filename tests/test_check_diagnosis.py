"""Each classic mistake is caught (exit 1) and the diagnosis names its cause.

Ground truth throughout: the check's reference, plain single-process torch autograd
in float64 over the whole global batch (tests/test_check.py proves it against
hand-written autograd).
"""

import json

from conftest import make_config
from scaledrill.commands.check import check_verb

SMALL = ("layout.workers=4", "layout.micro_batch=4", "layout.accum=2", "check.steps=2")
TEACHER = ("task=teacher", "task.model.hidden=16", *SMALL)
CHARLM = ("task=charlm", "task.model.d_model=16", "task.model.layers=1", "task.data.max_len=12", *SMALL)


def run(tmp_path, *overrides):
    if any(o.startswith("+check.step") for o in overrides) and not any(o.startswith("check.paths") for o in overrides):
        overrides = (*overrides, "check.paths=[accumulation,fused]")  # a step in processes: test_check_cli.py
    result = check_verb(make_config(*overrides, name="check"), tmp_path)
    return result.exit_code, json.loads((tmp_path / "check.json").read_text())


def step(name: str) -> str:
    return f"+check.step._target_=tests.fixtures_check.{name}"


def causes(report) -> str:
    return " | ".join(f["cause"] for f in report["diagnosis"])


def test_a_correct_custom_step_matches_on_threads_and_accumulation(tmp_path):
    code, report = run(tmp_path, *CHARLM, step("good_step"))
    assert code == 0, causes(report)
    assert [p["name"] for p in report["paths"]] == ["step:accumulation", "step:workers"]
    assert max(x["max_rel"] for p in report["paths"] for x in p["layers"]) < 1e-4  # vs float64 autograd


def test_mean_of_micro_batch_means_with_variable_token_counts(tmp_path):
    code, report = run(tmp_path, *CHARLM, step("mean_of_micro_means_step"))
    assert code == 1
    assert "mean of micro-batch means" in causes(report)
    # Off by far more than rounding: short sequences are over-weighted.
    assert max(x["max_rel"] for x in report["paths"][1]["layers"]) > 1e-3


def test_clip_inside_the_micro_step_loop(tmp_path):
    code, report = run(tmp_path, *TEACHER, step("clip_each_micro_step"))
    assert code == 1
    assert causes(report).startswith("clipping inside the micro-step loop")
    assert "after forward passes [1, 2] of 2" in report["diagnosis"][-1]["evidence"]


def test_sync_on_the_first_micro_step(tmp_path):
    code, report = run(tmp_path, *TEACHER, step("sync_first_micro_step"))
    assert code == 1
    names = {p["name"]: p["ok"] for p in report["paths"]}
    assert names == {"step:accumulation": True, "step:workers": False}  # one worker has nothing to sync
    assert report["diagnosis"][0]["cause"].startswith("sync on the wrong micro-step")
    assert "micro-steps 2..2 were never averaged" in report["diagnosis"][0]["evidence"]


def test_dropout_with_per_worker_seeds(tmp_path):
    code, report = run(tmp_path, *TEACHER, "task.model._target_=tests.fixtures_check.DropoutMLP", step("per_worker_dropout_step"))
    assert code == 1
    assert causes(report).startswith("dropout masks")
    assert "step:workers match the true batch" in report["diagnosis"][0]["evidence"]  # with p=0 it matches


def test_sample_keyed_dropout_matches_on_every_engine_path(tmp_path):
    code, report = run(tmp_path, *TEACHER, "task.model._target_=tests.fixtures_check.KeyedDropoutMLP",
                       "check.paths=[accumulation,fused,loop]")
    assert code == 0, causes(report)
