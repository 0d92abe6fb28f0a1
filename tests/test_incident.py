import json
import math

import numpy as np
import pytest
import torch

from scaledrill.telemetry.incident import first_layer, layer_trips, write_incident
from scaledrill.telemetry.layers import layer_stats

LAYERS = ["embed.weight", "fc1.weight", "fc1.bias", "fc2.weight"]


def history(rises: dict[str, tuple[int, float]], steps=30, every=10, seed=0):
    """Per-layer stats every `every` steps; layer L's ratio is multiplied by f from index i on."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(steps):
        stats = {}
        for name in LAYERS:
            ratio = 1e-3 * (1 + 0.1 * rng.standard_normal())  # healthy: ±10% noise around 1e-3
            start, f = rises.get(name, (steps, 1.0))
            ratio *= f if i >= start else 1.0
            stats[name] = {"weight_norm": 1.0, "grad_norm": 1.0, "update_norm": ratio, "update_ratio": ratio}
        out.append((i * every, stats))
    return out


def strict_load(path):
    def refuse(token):
        raise ValueError(f"non-strict JSON token {token}")

    return json.loads(path.read_text(), parse_constant=refuse)


def test_record_names_the_layer_that_rose_first(tmp_path):
    # fc2 rises 5x at index 20; fc1 rises 100x, but two records later: fc2 is first.
    hist = history({"fc2.weight": (20, 5.0), "fc1.weight": (22, 100.0)})
    scalars = [(s, {"loss": 1.0, "grad_norm": math.inf if s == 290 else 1.0}) for s, _ in hist]
    path = write_incident(tmp_path, 290, "grad_norm is inf at step 290", hist, scalars, "a: 1\n", "ckpt/step-200.pt")
    assert path == tmp_path / "incident-290.json"
    assert [p.name for p in tmp_path.iterdir()] == ["incident-290.json"]  # the temporary file is gone
    record = strict_load(path)
    assert record["first_layer"] == "fc2.weight"
    assert record["layer_trips"]["fc2.weight"]["step"] == 200
    assert record["layer_trips"]["fc1.weight"]["step"] == 220
    assert set(record["layer_trips"]) == {"fc1.weight", "fc2.weight"}  # healthy layers never trip
    assert record["step"] == 290 and record["reason"].startswith("grad_norm is inf")
    assert len(record["layers"]) == 20 and record["layers"][-1]["step"] == 290
    assert record["scalars"][-1]["scalars"]["grad_norm"] == "Infinity"
    assert record["config_yaml"] == "a: 1\n" and record["last_checkpoint"] == "ckpt/step-200.pt"


def test_tie_goes_to_the_largest_rise_and_nonfinite_trips():
    trips = layer_trips(history({"fc1.bias": (15, 4.0), "embed.weight": (15, 40.0)}))
    assert {trips[n]["step"] for n in trips} == {150}
    assert first_layer(trips) == "embed.weight"
    hist = history({"fc1.bias": (25, 4.0)})
    hist[12][1]["fc1.weight"]["update_ratio"] = math.nan
    trips = layer_trips(hist)
    assert trips["fc1.weight"]["step"] == 120 and first_layer(trips) == "fc1.weight"


def test_no_trip_on_a_healthy_history():
    trips = layer_trips(history({}))
    assert trips == {} and first_layer(trips) is None
    # The rule's factor: a 2x rise is below the default factor of 3, a 4x rise above it.
    assert layer_trips(history({"fc2.weight": (20, 2.0)})) == {}
    assert list(layer_trips(history({"fc2.weight": (20, 4.0)}))) == ["fc2.weight"]
    # A zero baseline (a bias that starts at zero, so its ratio reads 0) is no rise.
    hist = history({})
    for _, stats in hist[:6]:
        stats["fc1.bias"]["update_ratio"] = 0.0
    assert layer_trips(hist) == {}


def test_layer_stats_after_one_sgd_step():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(5, 4), torch.nn.Linear(4, 3))
    torch.nn.init.zeros_(model[1].bias)
    model[0].bias.requires_grad_(False)  # a parameter with no gradient
    model(torch.randn(8, 5)).square().mean().backward()
    names = [n for n, _ in model.named_parameters()]
    params = list(model.parameters())
    old = [p.detach().clone() for p in params]
    lr = 0.1
    with torch.no_grad():
        for p in params:
            if p.grad is not None:
                p -= lr * p.grad
    updates = [p.detach() - o for p, o in zip(params, old)]
    stats = layer_stats(names, old, [p.grad for p in params], updates)
    assert list(stats) == names
    w = stats["0.weight"]
    # Plain SGD: the update is lr·g, so update_norm = lr·grad_norm (to float32 rounding, rel 1e-5).
    assert w["weight_norm"] == pytest.approx(torch.linalg.vector_norm(old[0]).item(), rel=1e-6)
    assert w["grad_norm"] == pytest.approx(torch.linalg.vector_norm(params[0].grad).item(), rel=1e-6)
    assert w["update_norm"] == pytest.approx(lr * w["grad_norm"], rel=1e-5)
    assert w["update_ratio"] == pytest.approx(w["update_norm"] / w["weight_norm"], rel=1e-12)
    assert stats["0.bias"]["grad_norm"] == 0.0 and stats["0.bias"]["update_norm"] == 0.0
    assert stats["1.bias"]["weight_norm"] == 0.0 and stats["1.bias"]["update_ratio"] == 0.0
    assert stats["1.bias"]["update_norm"] > 0
    assert layer_stats([], [], [], []) == {}


def test_a_run_that_keeps_firing_writes_one_incident_per_window_and_logs_every_firing(tmp_path):
    from conftest import make_config
    from scaledrill.telemetry.monitor import Monitor, StepRecord
    from scaledrill.telemetry.store import read_events

    cfg = make_config("telemetry.on_trigger=continue", "telemetry.incident.steps=20")
    monitor = Monitor(cfg, tmp_path, 0, 8, 64, "{}")
    blamed = []
    monitor.blame = lambda: blamed.append(1) or {"loss": [0.0]}
    for step in range(50):  # a NaN loss every step: the non-finite detector fires each time
        assert monitor.observe(StepRecord(step, float("nan"), 0.1, 1.0, 1.0)) is None  # continue: no stop
    monitor.close("finished")
    files = sorted(tmp_path.glob("incident-*.json"))
    assert [f.name for f in files] == ["incident-0.json", "incident-20.json", "incident-40.json"]
    assert len(blamed) == 3  # the per-worker rerun only with a record
    events = [e for e in read_events(tmp_path / "run.sqlite") if e["kind"] == "detector"]
    assert len(events) == 50 and events[25]["detail"]["incident"].endswith("incident-20.json")
