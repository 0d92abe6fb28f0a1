"""The incident record: what one needs to explain a divergence, in one JSON file.

Why: when a detector fires, the question is not only "when" but "where did it
start". Large-batch divergence tends to begin in one layer whose updates outgrow
its weights (You, Gitman and Ginsburg 2017, arXiv 1708.03888, the case for LARS),
so the record names that layer.

The rule for `first_layer`, applied to each layer's update/weight ratio over the
per-layer history given (oldest first):

1. At each history step t with at least `min_points` earlier steps, the baseline
   is the median of that layer's ratios at all earlier steps.
2. The layer *trips* at the first t where its ratio exceeds `factor` × baseline
   (a baseline of 0, e.g. a zero-initialised bias, never trips), or is not
   finite. Its rise is ratio / baseline (infinite if not finite).
3. `first_layer` is the layer that trips at the earliest step; a tie goes to the
   largest rise, then to the name. None when no layer trips.

`workers`, when the engine supplies it, names each worker's loss and gradient
norm at the step, the outlier workers and their sample indices (train/blame.py).

The file is written next to the run as `incident-<step>.json`, atomically (a
temporary file, fsync, then rename), so a reader never sees half a record.
Non-finite numbers are written as the strings "NaN", "Infinity", "-Infinity" to
keep the file strict JSON.
"""

import json
import math
import os
import statistics
from collections.abc import Sequence
from pathlib import Path

History = Sequence[tuple[int, dict[str, dict[str, float]]]]


def layer_trips(history: History, factor: float = 3.0, min_points: int = 3) -> dict[str, dict]:
    """Steps 1-2 for every layer: layer -> {"step", "ratio", "baseline", "rise"} of its first trip."""
    series: dict[str, list[tuple[int, float]]] = {}
    for step, layers in history:
        for layer, stats in layers.items():
            if "update_ratio" in stats:  # a step skipped for overflow records no update
                series.setdefault(layer, []).append((step, stats["update_ratio"]))
    trips = {}
    for layer, points in series.items():
        for i in range(min_points, len(points)):
            step, ratio = points[i]
            if not math.isfinite(ratio):
                trips[layer] = {"step": step, "ratio": ratio, "baseline": None, "rise": math.inf}
                break
            baseline = statistics.median(r for _, r in points[:i])  # all finite: a non-finite one trips
            if baseline > 0 and ratio > factor * baseline:
                trips[layer] = {"step": step, "ratio": ratio, "baseline": baseline, "rise": ratio / baseline}
                break
    return trips


def first_layer(trips: dict[str, dict]) -> str | None:
    """Step 3: earliest trip, then largest rise, then name."""
    if not trips:
        return None
    return min(trips, key=lambda name: (trips[name]["step"], -trips[name]["rise"], name))


def write_incident(
    run_dir: str | Path,
    step: int,
    reason: str,
    history: History,
    scalars_history: Sequence[tuple[int, dict[str, float]]],
    config_yaml: str,
    last_checkpoint: str | None,
    keep: int = 20,
    factor: float = 3.0,
    workers: dict | None = None,
) -> Path:
    """Write `incident-<step>.json` into `run_dir` and return its path.

    The whole per-layer history is used to find the first layer; only its last
    `keep` steps (and of the scalars) are written out.
    """
    trips = layer_trips(history, factor=factor)
    record = {
        "step": step,
        "reason": reason,
        "first_layer": first_layer(trips),
        "first_layer_rule": (
            f"first layer whose update/weight ratio exceeds {factor:g}x the median of its own earlier "
            "ratios (or turns non-finite); ties by largest rise"
        ),
        "layer_trips": trips,
        "layers": [{"step": s, "layers": stats} for s, stats in list(history)[-keep:]],
        "scalars": [{"step": s, "scalars": values} for s, values in list(scalars_history)[-keep:]],
        "workers": workers,  # each worker's loss and gradient norm at the step, the outliers and their samples (train/blame.py)
        "config_yaml": config_yaml,
        "last_checkpoint": last_checkpoint,
    }
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    final = run_dir / f"incident-{step}.json"
    tmp = final.with_suffix(".json.tmp")
    with open(tmp, "w", encoding="utf-8") as f:
        json.dump(_strict(record), f, indent=1, allow_nan=False)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, final)
    return final


def _strict(value):
    """Non-finite floats as strings, so the record is strict JSON."""
    if isinstance(value, float) and not math.isfinite(value):
        return "NaN" if math.isnan(value) else ("Infinity" if value > 0 else "-Infinity")
    if isinstance(value, dict):
        return {str(k): _strict(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_strict(v) for v in value]
    return value
