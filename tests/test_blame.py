"""Which worker blew up: a corrupted sample planted in one worker's batch is named, with its worker."""

import json

import pytest

from conftest import run_cli
from scaledrill.layout import Layout
from scaledrill.tasks.sampler import Sampler
from scaledrill.telemetry.store import read_scalars
from scaledrill.train.blame import robust_outliers

W, B_MICRO, SIZE, SEED = 8, 8, 512, 0
STEP, WORKER, POSITION = 3, 5, 2  # where the bad sample is planted


def test_robust_outliers():
    assert robust_outliers([1.0, 1.1, 0.9, 1.0, 9.0]) == [4]
    assert robust_outliers([1.0, 1.0, 1.0, 1.0]) == []  # identical workers: nobody to blame
    assert robust_outliers([1.0, 5.0]) == []  # two workers: no median to stand against
    assert robust_outliers([1.0, 1.1, float("nan"), 0.9]) == [2]
    assert robust_outliers([1.0, 1.1, 0.9, 1.0, 0.01]) == []  # one-sided
    assert robust_outliers([float("nan")] * 4) == []  # all alike: nobody stands out


@pytest.mark.parametrize("procs, backend, model", [(1, "local", "TinyNet"), (2, "gloo", "TinyNet"), (1, "local", "DropoutNet")])
def test_the_incident_names_the_worker_and_the_sample(tmp_path, procs, backend, model):
    sampler = Sampler(SIZE, Layout(W, 1, B_MICRO, 1, "local"), SEED, "drop")
    bad = int(sampler.worker_batches(STEP, range(W))[0, WORKER, POSITION])
    done = run_cli("run", "~task.model", f"+task.model._target_=tests.fixtures_user.{model}", "+task.model.activation=relu", "~task.data",
                   "+task.data._target_=tests.fixtures_user.CorruptedBlobData", f"+task.data.bad={bad}",
                   f"layout.workers={W}", f"layout.procs={procs}", f"layout.backend={backend}", f"layout.micro_batch={B_MICRO}",
                   "optim.lr=0.05", "train.steps=10", "train.eval_every=0", "train.progress=false", f"hydra.run.dir={tmp_path}")
    assert done.returncode == 0, done.stderr
    record = json.loads((tmp_path / f"incident-{STEP}.json").read_text())  # the run fused its workers; blame reran them
    workers = record["workers"]
    assert workers["step"] == STEP and len(workers["loss"]) == W and len(workers["grad_norm"]) == W
    assert [o["worker"] for o in workers["outliers"]] == [WORKER]
    (outlier,) = workers["outliers"]
    assert outlier["samples"][POSITION] == bad and len(outlier["samples"]) == B_MICRO
    assert outlier["worst_samples"][0]["index"] == bad
    # The mean of the workers' losses, each worker rerun alone, is the loss the run logged at that step
    # (with stock dropout too: each sample gets the mask it had in the step).
    logged = read_scalars(tmp_path / "run.sqlite")["loss"][1][STEP]
    assert sum(workers["loss"]) / W == pytest.approx(float(logged), rel=1e-5)


def test_the_weights_are_kept_only_on_the_steps_a_detector_fires(tmp_path, monkeypatch):
    """The engine asks the monitor before each update: the per-worker rerun's copy of the model is
    taken on the firing steps alone, and the incident still holds the rows of the firing step."""
    from conftest import make_config
    from scaledrill.dist import LocalCollective
    from scaledrill.telemetry.store import read_events
    from scaledrill.train.blame import WorkerBlame
    from scaledrill.train.engine import run_training

    kept = []
    keep = WorkerBlame.keep_params
    monkeypatch.setattr(WorkerBlame, "keep_params", lambda self: (kept.append(self.step), keep(self))[1])
    sampler = Sampler(SIZE, Layout(W, 1, B_MICRO, 1, "local"), SEED, "drop")
    bad = int(sampler.worker_batches(STEP, range(W))[0, WORKER, POSITION])
    cfg = make_config("~task.model", "+task.model._target_=tests.fixtures_user.TinyNet", "+task.model.activation=relu", "~task.data",
                      "+task.data._target_=tests.fixtures_user.CorruptedBlobData", f"+task.data.bad={bad}", f"layout.workers={W}",
                      f"layout.micro_batch={B_MICRO}", "optim.lr=0.05", "train.steps=10", "train.eval_every=0", "train.progress=false",
                      "telemetry.on_trigger=continue")
    run_training(cfg, LocalCollective(), run_dir=tmp_path)
    fired = sorted({e["step"] for e in read_events(tmp_path / "run.sqlite") if e["kind"] == "detector"})
    assert fired and fired[0] == STEP
    assert kept == fired
    record = json.loads((tmp_path / f"incident-{STEP}.json").read_text())
    assert [o["worker"] for o in record["workers"]["outliers"]] == [WORKER]
