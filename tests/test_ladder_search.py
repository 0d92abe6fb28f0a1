"""The budgeted lr search of a rung, on the noisy quadratic model."""

import json

import pytest

from conftest import make_config
from scaledrill.commands.ladder import ladder_verb
from scaledrill.errors import ConfigError
from scaledrill.ladder.rungs import plan_ladder
from scaledrill.ladder.search import SearchSettings, search_lr

QUAD = (
    "task=quadratic", "task.data.dim=16", "optim.momentum=0", "layout.micro_batch=2", "layout.workers=16",
    "telemetry.layer_every=0", "train.progress=false", "train.eval_every=0", "ladder.rungs=1",
    "ladder.goal.value=0.05", "ladder.check_every=2", "ladder.max_steps=60", "optim.lr=0.5",
)
STABLE = 2.0  # plain SGD on the quadratic is stable only for lr < 2/max h = 2 (Zhang et al. 2019; h_max = 1)


def search(*overrides):
    cfg = make_config(*QUAD, *overrides, name="ladder")
    plan = plan_ladder(cfg)
    return search_lr(cfg, plan, plan.rungs[0], 0.5).to_json()


def test_search_stops_diverging_trials_and_finds_a_stable_rate():
    # pruning starts at step 6, so only divergence can stop a trial before it
    out = search("ladder.search.trials=12", "ladder.search.lo=0.1", "ladder.search.hi=20", "ladder.search.min_steps=6")
    trials = out["trials"]
    assert len(trials) == 12 and out["diverged"] == sum(t["diverged"] for t in trials) >= 1
    for t in trials:
        if t["lr"] > 1.1 * STABLE:  # |1 − lr·h₁| > 1.2: the loss grows ×1.44 a step, 10× within ~10 steps
            assert (t["diverged"] or t["pruned"]) and not t["reached"] and t["steps"] <= 12, t
        if t["lr"] > 1.5 * STABLE:  # ≥ ×4 a step: past 10× its first loss after 3 updates, before pruning starts
            assert t["diverged"] and t["steps"] <= 5, t
        if t["lr"] < 0.95 * STABLE:
            assert not t["diverged"], t
    assert out["best_lr"] < STABLE and any(t["reached"] and t["lr"] == out["best_lr"] for t in trials)
    lo, hi = out["window"]
    assert 0 < lo <= out["best_lr"] <= hi < STABLE
    assert out["samples_spent"] == sum(t["steps"] for t in trials) * 32


@pytest.mark.parametrize("pruner", ["halving", "hyperband"])
def test_the_pruner_stops_slow_trials_before_the_budget(pruner):
    # a target the budget cannot reach, so no trial stops early by succeeding: only the pruner cuts them
    out = search("ladder.search.trials=10", f"ladder.search.pruner={pruner}", "ladder.search.hi=3",
                 "ladder.goal.value=0.001", "ladder.max_steps=40")
    pruned = [t for t in out["trials"] if t["pruned"]]
    assert len(pruned) >= 2 and all(t["steps"] < 40 for t in pruned)
    assert out["pruned"] == len(pruned) and out["window"] is None
    assert out["best_lr"] is not None  # best final loss among the trials that ran out their budget


def test_a_seeded_search_is_reproducible():
    first, second = (search("ladder.search.trials=5", "ladder.search.seed=7") for _ in range(2))
    assert first["trials"] == second["trials"]
    other = search("ladder.search.trials=5", "ladder.search.seed=8")
    assert [t["lr"] for t in other["trials"]] != [t["lr"] for t in first["trials"]]


def test_warmup_is_searched_when_asked():
    out = search("ladder.search.trials=4", "ladder.search.warmup_max=10")
    assert all(0 <= t["warmup"] <= 10 for t in out["trials"])


def test_ladder_json_holds_the_search_per_rung(tmp_path):
    cfg = make_config(*QUAD, "layout.workers=4", "ladder.rungs=2", "ladder.search.enabled=true", "ladder.search.trials=4",
                      name="ladder")
    ladder_verb(cfg, tmp_path)
    saved = json.loads((tmp_path / "ladder.json").read_text())
    assert set(saved["search"]) == {"8", "16"}
    for entry in saved["search"].values():
        assert {"best_lr", "window", "trials", "samples_spent"} <= set(entry) and len(entry["trials"]) == 4
        assert {"lr", "reached", "diverged", "pruned", "steps"} <= set(entry["trials"][0])


@pytest.mark.parametrize(
    "key, value",
    [("pruner", "median"), ("hi", 0.01), ("trials", 0), ("reduction", 1), ("warmup_max", -1),
     ("storage", "/no/such/dir/search.journal"), ("study", "' '")],
)
def test_bad_search_settings_name_the_key(key, value):
    cfg = make_config(*QUAD, f"ladder.search.{key}={value}", name="ladder")
    with pytest.raises(ConfigError) as err:
        SearchSettings.from_config(cfg.ladder.search, 2)
    assert err.value.key == f"ladder.search.{key}"
