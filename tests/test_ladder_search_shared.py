"""A learning-rate search shared by two `scaledrill ladder` processes through one Optuna journal file."""

import json
import os
import subprocess

import optuna
from optuna.storages import JournalStorage
from optuna.storages.journal import JournalFileBackend

from conftest import ROOT, SCALEDRILL
from test_ladder_search import QUAD

TRIALS = 10


def test_two_processes_finish_one_study_without_losing_or_repeating_a_trial(tmp_path):
    journal = tmp_path / "search.journal"
    shared = [*QUAD, "ladder.search.enabled=true", f"ladder.search.trials={TRIALS}", "ladder.max_steps=80",
              f"ladder.search.storage={journal}", "ladder.search.study=shared"]  # fmt: skip
    env = dict(os.environ, OMP_NUM_THREADS="1")
    procs = [
        subprocess.Popen([*SCALEDRILL, "ladder", *shared, f"hydra.run.dir={tmp_path / name}"], cwd=ROOT, env=env,
                         stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        for name in ("a", "b")
    ]
    for p in procs:
        out, _ = p.communicate(timeout=300)
        assert p.returncode == 0, out

    study = optuna.load_study(study_name="shared-B32", storage=JournalStorage(JournalFileBackend(str(journal))))
    trials = study.get_trials()
    # MaxTrialsCallback counts running trials too, so the study overshoots by at most one per extra process
    assert TRIALS <= len(trials) <= TRIALS + 1
    assert sorted(t.number for t in trials) == list(range(len(trials)))  # none lost, none numbered twice
    done = (optuna.trial.TrialState.COMPLETE, optuna.trial.TrialState.PRUNED)
    assert all(t.state in done and "record" in t.user_attrs for t in trials)
    assert len({t.params["lr"] for t in trials}) == len(trials)  # the two samplers never drew the same rate
    assert {t.user_attrs["record"]["lr"] for t in trials} == {t.params["lr"] for t in trials}

    # each ladder.json lists the study's trials finished when its process ended; the last one sees them all
    searches = [json.loads((tmp_path / name / "ladder.json").read_text())["search"]["32"] for name in ("a", "b")]
    assert max(len(s["trials"]) for s in searches) == len(trials)
    assert all(t in [u.user_attrs["record"] for u in trials] for s in searches for t in s["trials"])
