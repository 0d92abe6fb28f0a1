"""Rungs trained as separate jobs (one `-m` job per rung) gathered back into one ladder."""

import json

import pytest

from conftest import make_config
from scaledrill.commands.ladder import ladder_verb
from scaledrill.ladder.gather import gather
from test_ladder_search import QUAD


def test_gathered_jobs_give_the_fit_one_ladder_process_gives(tmp_path):
    whole = ladder_verb(make_config(*QUAD, "layout.workers=4", "ladder.rungs=3", name="ladder"), tmp_path).payload
    assert whole["fit"] is not None  # the reference: one process, three rungs
    # the same rungs as three one-rung ladder.json files, out of order, as three jobs would leave them
    jobs = [dict(whole, rungs=[json.loads(json.dumps(r)) | {"regime": None}], fit=None) for r in whole["rungs"]][::-1]
    gathered = gather(jobs)
    assert [r["global_batch"] for r in gathered["rungs"]] == [8, 16, 32]
    assert gathered["fit"] == pytest.approx(whole["fit"])
    assert [r["regime"] for r in gathered["rungs"]] == [r["regime"] for r in whole["rungs"]]
    assert gathered["noise_scale_measured"] == whole["noise_scale_measured"]


def test_ladders_with_different_goals_are_not_one_ladder():
    rung = {"global_batch": 8, "steps_to_target": 10, "diverged": False, "noise_scale": None}
    a = {"grow": "workers", "goal": {"metric": "loss", "value": 0.1, "reached_when": "below"}, "rungs": [rung]}
    b = dict(a, goal={"metric": "loss", "value": 0.2, "reached_when": "below"}, rungs=[rung | {"global_batch": 16}])
    with pytest.raises(ValueError, match="different growths or goals"):
        gather([a, b])
