"""Ladder targets from the task's declared goal, which setting binds a rung's steps, and the B_crit flag."""

import pytest
from omegaconf import OmegaConf
from rich.console import Console

from conftest import make_config
from scaledrill.errors import ConfigError
from scaledrill.ladder.climb import agreement, ladder_json
from scaledrill.ladder.fit import fit_tradeoff, predicted_steps
from scaledrill.ladder.rungs import Plan, Rung, Goal, plan_ladder
from scaledrill.ladder.show import caption_lines, render_ladder

BASE = ["layout.workers=2", "layout.micro_batch=2", "ladder.rungs=2", "train.progress=false"]


def plan(*overrides):
    return plan_ladder(OmegaConf.create(OmegaConf.to_container(make_config(*BASE, *overrides, name="ladder"), resolve=True)))


@pytest.mark.parametrize("task, metric, value, mode", [
    ("digits", "accuracy", 0.9, "above"), ("quadratic", "loss", 0.05, "below"),
    ("teacher", "loss", 2.5, "below"), ("charlm", "loss", 2.3, "below"),
])
def test_every_built_in_task_declares_a_goal_the_ladder_uses(task, metric, value, mode):
    p = plan(f"task={task}")
    assert p.goal == Goal(metric, value, mode)
    assert p.goal_source == f"ladder.goal not set: using task {task}'s goal (task.goal)"


def test_an_explicit_goal_wins_over_the_goal():
    p = plan("task=digits", "ladder.goal.metric=loss", "ladder.goal.value=0.5")
    assert p.goal == Goal("loss", 0.5, "below") and p.goal_source == "ladder.goal"


def test_a_task_without_a_goal_says_why_there_is_no_fit():
    p = plan("task=teacher", "~task.goal")
    assert p.goal.value is None and p.goal_source.startswith("no goal:") and "task.goal" in p.goal_source
    payload = ladder_json(p, [], None)
    assert caption_lines(payload) == [p.goal_source]  # one line of explanation, no "no fit" on top


def test_a_bad_goal_names_its_key():
    with pytest.raises(ConfigError) as err:
        plan("task=digits", "task.goal.reached_when=sideways")
    assert err.value.key == "task.goal.reached_when"


def test_the_step_cap_and_the_sample_budget_say_which_binds():
    capped = plan("task=quadratic", "ladder.max_samples=400000", "train.steps=200")  # 400000 // 4 = 100000 > 200
    assert [r.steps for r in capped.rungs] == [200, 200]
    assert capped.rungs[0].limit == "train.steps=200 caps the sample budget (400000 // B = 100000 steps)"
    budget = plan("task=quadratic", "ladder.max_samples=400", "ladder.max_steps=150")  # 400 // 4 = 100, 400 // 8 = 50
    assert [r.steps for r in budget.rungs] == [100, 50]
    assert budget.rungs[1].limit == "sample budget ladder.max_samples=400 // B"
    assert plan("task=quadratic").rungs[0].limit == "train.steps=200 (no sample budget)"


def _result(batch, steps, noise):
    return {"global_batch": batch, "steps_to_target": steps, "diverged": False, "noise_scale": noise,
            "workers": 1, "micro_batch": batch, "accum": 1, "lr": 0.1, "samples_to_target": None,
            "final_metric": 0.0, "wall_seconds": 1.0}  # fmt: skip


def test_disagreeing_b_crit_and_noise_scale_are_flagged_and_missed_rungs_get_no_regime():
    # rungs on S = S_min (1 + B_noise / B) with S_min = 100, B_noise = 2526 (McCandlish et al. 2018, eq. 2.11)
    exact = fit_tradeoff([64, 256], [100 * (1 + 2526 / 64), 100 * (1 + 2526 / 256)])
    steps = [round(predicted_steps(exact, b)) for b in (64, 256, 1024)]
    rungs = [Rung(b, 1, 1, 5000, "train.steps=5000 (no sample budget)") for b in (64, 256, 1024, 4096)]
    p = Plan("workers", Goal("loss", 0.1, "below"), 10, rungs)
    results = [_result(b, s, 424.0) for b, s in zip((64, 256, 1024), steps)] + [_result(4096, None, 424.0)]
    payload = ladder_json(p, results, None)
    assert payload["fit"]["b_crit"] == pytest.approx(2526, rel=0.01)
    assert payload["agreement"]["flagged"] and payload["agreement"]["ratio"] == pytest.approx(2526 / 424, rel=0.01)
    assert [r["regime"] is None for r in payload["rungs"]] == [False, False, False, True]  # B=4096 missed the target
    console = Console(record=True, width=240)
    console.print(render_ladder(payload))
    text = console.export_text()
    assert "(more than 2×)" in text and f"disagree by {payload['agreement']['ratio']:.1f}×" in text and "≈" not in text


def test_agreement_within_two_is_not_flagged():
    assert agreement(500.0, 424.0) == {"ratio": pytest.approx(500 / 424), "flagged": False}
    assert agreement(None, 424.0) is None and agreement(500.0, None) is None
