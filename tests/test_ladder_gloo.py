"""Ladder rungs on 2 gloo processes against the same rungs in one local process.

A gloo rung cannot stop at the target: it trains its whole budget and the ladder
reads the first hit back from the run store (train_loss) or the summary's
evaluations. Layout invariance makes it the run of the local backend, up to the
order of the float32 sums: each process sums its own workers before the
all-reduce. The README's check rule bounds that rounding for the parameters
after t steps by C·u·√B·t·max|θ| (C = 32, u = 2⁻²⁴); a loss quadratic in θ
doubles the relative error, so losses are compared within 2·C·u·√B·t·max|L|.
"""

import json
import math
from pathlib import Path

import numpy as np
import pytest

from conftest import make_config
from scaledrill.commands.ladder import ladder_verb
from scaledrill.telemetry.store import read_scalars

QUAD = (
    "task=quadratic", "task.data.dim=16", "optim.momentum=0", "layout.micro_batch=2", "layout.workers=2",
    "telemetry.layer_every=0", "train.progress=false", "train.eval_every=0", "optim.lr=0.2", "scaling=linear",
    "scaling.base_batch=4", "ladder.goal.value=0.05",
)
GLOO = ("layout.backend=gloo", "layout.procs=2")
C, U = 32, 2.0**-24


def loss_tolerance(batch: int, steps: int, losses) -> float:
    return 2 * C * U * math.sqrt(batch) * steps * float(np.max(np.abs(losses)))


def both_ladders(tmp_path, *overrides):
    local = ladder_verb(make_config(*QUAD, *overrides, name="ladder"), tmp_path / "local").payload
    gloo = ladder_verb(make_config(*QUAD, *overrides, *GLOO, name="ladder"), tmp_path / "gloo").payload
    return local, gloo


def summary_of(record: dict) -> dict:
    return json.loads((rung_dir(record) / "summary.json").read_text())


def rung_dir(record: dict) -> Path:
    return Path(record["run_dir"])


def test_gloo_rungs_read_the_first_hit_of_the_training_loss_back_from_the_store(tmp_path):
    # checks at steps 7 and 13 (the last of the budget, which 7 does not divide)
    local, gloo = both_ladders(tmp_path, "ladder.rungs=2", "ladder.goal.metric=train_loss", "ladder.check_every=7",
                               "ladder.max_steps=13")
    early, last = local["rungs"]
    # the setting exercises both reads: one rung hits before its budget ends, one on its very last step
    assert early["steps_to_target"] == 7 and summary_of(early)["stopped_early"] and summary_of(early)["steps"] == 7
    assert last["steps_to_target"] == 13 and summary_of(last)["steps"] == 13

    for here, there in zip(local["rungs"], gloo["rungs"]):
        summary = summary_of(there)
        assert summary["backend"] == "gloo" and summary["procs"] == 2
        assert summary["steps"] == 13 and not summary["stopped_early"]  # the whole budget, target or not
        ours = read_scalars(rung_dir(here) / "run.sqlite")["loss"][1]
        theirs = read_scalars(rung_dir(there) / "run.sqlite")["loss"][1]
        B = here["global_batch"]
        np.testing.assert_allclose(theirs[: len(ours)], ours, rtol=0, atol=loss_tolerance(B, 13, ours))
        # the first hit, recomputed from the gloo store at the steps the ladder checks
        checked = [s for s in range(1, 14) if s % 7 == 0 or s == 13]
        first = next(s for s in checked if theirs[s - 1] < 0.05)
        assert there["steps_to_target"] == first == here["steps_to_target"]
        assert there["final_metric"] == theirs[first - 1]  # the loss at the hit, not at the end of the budget
        # no checked loss lies within the rounding bound of the target: summation order cannot move the hit
        assert all(abs(ours[s - 1] - 0.05) > loss_tolerance(B, 13, ours) for s in checked if s <= len(ours))
        assert there["samples_to_target"] == first * B and not there["diverged"] and not there.get("error")
        assert there["lr"] == pytest.approx(here["lr"], rel=1e-12)
        # measured up to the hit, as the local rung that stopped there; a ratio of float64 sums of float32 norms
        assert there["noise_scale"] == pytest.approx(here["noise_scale"], rel=1e-4)
    # the rung that hit at its first check (step 7) only bounds its steps: both ladders leave it out of the fit
    assert gloo["first_check"] == local["first_check"] == [early["global_batch"]]
    assert gloo["fit"] is None and local["fit"] is None  # one measured rung is too few to fit


def test_gloo_rung_reads_the_first_evaluated_hit_back_and_ignores_what_its_budget_did_after(tmp_path):
    # the linear rule makes the peak 6.0 at B=8, warmed up from 0.6: past lr = 2/max h = 2 (step 26) SGD is unstable,
    # so the target falls early and the loss explodes later in the budget
    local, gloo = both_ladders(tmp_path, "ladder.batches=[8]", "ladder.check_every=5", "ladder.max_steps=150",
                               "optim.lr=3.0", "schedule.warmup_steps=100", "schedule.warmup_start=0.1",
                               "ladder.goal.value=0.3")
    here, there = local["rungs"][0], gloo["rungs"][0]
    assert summary_of(here)["stopped_early"] and not here["diverged"]  # the local rung stops at the hit
    summary = summary_of(there)
    assert summary["diverged"] and ("loss spike" in summary["stop_reason"] or "loss rise" in summary["stop_reason"]) and 26 < summary["steps"] < 150
    history = {int(k): v["loss"] for k, v in summary["eval_history"].items()}
    assert sorted(history) == [*range(5, summary["steps"], 5), summary["steps"]]  # every check, and the stop
    first = min(s for s, v in history.items() if v < 0.3)
    assert there["steps_to_target"] == first == here["steps_to_target"] < 25
    tol = loss_tolerance(8, first, [history[s] for s in history if s <= first])
    assert there["final_metric"] == history[first] == pytest.approx(here["final_metric"], rel=0, abs=tol)
    assert all(abs(history[s] - 0.3) > tol for s in history if s <= first)
    assert not there["diverged"]  # the spike came after the hit, where the local rung had already stopped
    # the fused path measures the noise scale every 25 steps: the value at the hit, not the later ones
    assert there["noise_scale"] == pytest.approx(here["noise_scale"], rel=1e-4)
    later = read_scalars(rung_dir(there) / "run.sqlite")["b_simple"][1][-1]  # measured at step 25
    assert later != pytest.approx(there["noise_scale"], rel=0.1)
