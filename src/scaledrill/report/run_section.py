"""The run kind of report section: summary, curves, per-layer heatmaps, incidents.

Why on its own: a run directory holds the most (a summary, a run store with
scalars, layer statistics and events, incident records), and the other kinds
reuse its reader of JSON files. Every part is optional; what is missing is named.
"""

import json
import re
from pathlib import Path

import numpy as np

from scaledrill.report import figures as fg
from scaledrill.report.html import Section, absent, figure, key_values, table, verdict
from scaledrill.telemetry.store import read_events, read_layers, read_scalars

RUN_KEYS = ("task", "optimizer", "workers", "procs", "micro_batch", "accum", "global_batch", "backend", "sync",
            "steps", "samples_seen", "peak_lr", "final_loss", "noise_scale", "compression_ratio",
            "wire_bytes_per_worker_step", "mean_cosine_to_exact", "diverged", "stop_reason", "wall_seconds")  # fmt: skip
RUN_PLOTS = (  # (title, y label, scalar names, log y)
    ("Training loss", "loss", ("loss",), True),
    ("Learning-rate schedule", "learning rate", ("lr",), False),
    ("Gradient norm before and after clipping", "global norm", ("grad_norm", "grad_norm_clipped"), True),
    ("Gradient noise scale", "samples", ("b_simple",), True),
    ("Compression fidelity", "vs exact average", ("cosine_to_exact", "rel_error_to_exact"), False),
    ("Bytes sent per worker per step", "bytes", ("wire_bytes_per_worker",), False),
)
HEATMAPS = (("update_ratio", "update / weight norm"), ("trust_ratio", "trust ratio"))


def load_json(path: Path):
    """(document, None) or (None, why it could not be read)."""
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None, f"{path.name} is missing"
    except (OSError, ValueError) as err:
        return None, f"{path.name} could not be read ({err})"
    if not isinstance(doc, dict):  # every result file this tool writes is one JSON object
        return None, f"{path.name} could not be read (it holds a JSON {type(doc).__name__}, not an object of named results)"
    return doc, None


def _series(scalars: dict, names) -> list:
    return [(name, *scalars[name]) for name in names if name in scalars]


def _store_blocks(store: Path) -> tuple[list[str], list[str]]:
    """Figures of a run store, and the names of what it does not hold."""
    if not store.is_file():
        return [], ["run.sqlite (no curves)"]
    scalars, blocks, missing = read_scalars(store), [], []
    for title, ylabel, names, logy in RUN_PLOTS:
        series = _series(scalars, names)
        if not series:
            missing.append(" / ".join(names))
            continue
        alt = f"{title}: {', '.join(s[0] for s in series)} against step"
        blocks.append(figure(fg.lines(title, series, ylabel=ylabel, logy=logy), alt))
    for name, label in HEATMAPS:
        steps, layers, matrix = read_layers(store, name)
        if not layers:
            missing.append(f"per-layer {name}")
            continue
        alt = f"Heatmap of per-layer {label} ({len(layers)} layers × {len(steps)} steps)"
        blocks.append(figure(fg.heatmap(f"Per-layer {label}", steps, layers, matrix, label), alt))
    events = read_events(store)
    if events:
        rows = [(e["step"], e["kind"], json.dumps(e["detail"])[:120]) for e in events]
        blocks.append(table("Events the run recorded", ("step", "kind", "detail"), rows))
    return blocks, missing


def _eval_blocks(summary: dict) -> list[str]:
    history = summary.get("eval_history") or {}
    blocks = []
    if summary.get("eval"):
        blocks.append(key_values("Final evaluation", summary["eval"]))
    steps = sorted(history, key=float)
    metrics = sorted({m for s in steps for m in history[s]})
    if steps and metrics:
        series = [(m, [float(s) for s in steps], [history[s].get(m, np.nan) for s in steps]) for m in metrics]
        alt = f"Evaluation metrics ({', '.join(metrics)}) against step"
        blocks.append(figure(fg.lines("Evaluation metrics", series, ylabel="metric"), alt))
    return blocks


def _incident_blocks(directory: Path) -> list[str]:
    rows, blamed = [], []
    for path in sorted(directory.glob("incident-*.json"), key=lambda p: int(re.sub(r"\D", "", p.stem) or 0)):
        doc, problem = load_json(path)
        doc = doc or {}
        workers = doc.get("workers") or {}
        names = ", ".join(str(o.get("worker")) for o in workers.get("outliers", [])) or ("none" if workers else "-")
        rows.append((path.name, doc.get("step"), doc.get("reason", problem), doc.get("first_layer"), names,
                     doc.get("last_checkpoint")))  # fmt: skip
        for o in workers.get("outliers", []):
            worst = ", ".join(f"{s.get('index')} (loss {s.get('loss'):.4g})" for s in o.get("worst_samples", [])[:3])
            blamed.append((doc.get("step"), o.get("worker"), o.get("loss"), o.get("grad_norm"), worst,
                           " ".join(map(str, o.get("samples", [])))[:200]))
    if not rows:
        return []
    blocks = [table("Incidents (divergence records)", ("file", "step", "reason", "first layer", "outlier workers",
                                                       "last checkpoint"), rows)]
    if blamed:
        blocks.append(table("Which worker blew up: outlier workers at the trigger step (each rerun alone; median/MAD rule)",
                            ("step", "worker", "loss", "gradient norm", "worst samples (index, own loss)",
                             "all sample indices"), blamed))
    return blocks


def run_section(directory: Path, source: str) -> Section:
    """A training run: its summary, curves, per-layer heatmaps and incidents."""
    section = Section("run", "Training run", source)
    summary, problem = load_json(directory / "summary.json")
    missing = [problem] if problem else []
    if summary:
        if summary.get("diverged"):
            section.blocks.append(verdict(False, f"diverged ({summary.get('stop_reason', 'no reason given')})"))
        section.blocks.append(key_values("Run summary", {k: summary[k] for k in RUN_KEYS if k in summary}))
    plots, not_stored = _store_blocks(directory / "run.sqlite")
    section.blocks += plots[:1] + (_eval_blocks(summary) if summary else []) + plots[1:] + _incident_blocks(directory)
    section.blocks.append(absent(missing + not_stored))
    return section
