"""Telemetry inside a real run: the incident record names the layer made to blow up;
a healthy run stays quiet; TensorBoard event files when asked."""

import json

from conftest import make_config
from scaledrill.dist import LocalCollective
from scaledrill.telemetry import read_events, read_layers, read_scalars
from scaledrill.train.engine import run_training

BASE = ("task=teacher", "layout.workers=4", "layout.micro_batch=8", "train.eval_every=0", "telemetry.noise_every=0",
        "telemetry.layer_every=1", "optim.lr=0.01", "optim.momentum=0.0")


def test_incident_names_the_layer_that_blew_up(tmp_path):
    cfg = make_config(*BASE, "train.steps=80", "~task.model", "+task.model._target_=fixtures_telemetry.BlowUpAfter",
                      "+task.model.at=40")
    summary = run_training(cfg, LocalCollective(), run_dir=tmp_path)
    assert summary["diverged"] and summary["steps"] == 41, summary["stop_reason"]  # stopped on the step it blew up
    (incident,) = tmp_path.glob("incident-*.json")
    record = json.loads(incident.read_text())
    assert record["step"] == 40 and record["first_layer"] == "late.weight"
    assert "early.weight" not in record["layer_trips"]
    events = read_events(tmp_path / "run.sqlite")
    assert [e["kind"] for e in events] == ["detector"]
    steps, layers, ratios = read_layers(tmp_path / "run.sqlite", "update_ratio")
    late = layers.index("late.weight")
    assert ratios[-1, late] > 50 * ratios[-2, late]  # the update/weight ratio jumped (it saturates near 1)


def test_healthy_run_is_quiet_and_writes_tensorboard_events(tmp_path):
    cfg = make_config(*BASE, "train.steps=60", "telemetry.tensorboard=true")
    summary = run_training(cfg, LocalCollective(), run_dir=tmp_path)
    assert not summary["diverged"] and summary["steps"] == 60
    assert not list(tmp_path.glob("incident-*.json"))
    steps, loss = read_scalars(tmp_path / "run.sqlite")["loss"]
    assert list(steps) == list(range(60)) and loss[-1] < loss[0]
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    (folder,) = [p.parent for p in (tmp_path / "tensorboard").glob("events.out.tfevents.*")]
    events = EventAccumulator(str(folder))
    events.Reload()
    logged = [e.value for e in events.Scalars("loss")]
    assert len(logged) == 60 and abs(logged[-1] - float(loss[-1])) < 1e-5 * abs(float(loss[-1]))
