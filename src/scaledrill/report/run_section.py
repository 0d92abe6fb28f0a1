"""The run kind of report section: summary, curves, per-layer heatmaps, incidents.

Why on its own: a run directory holds the most (a summary, a run store with
scalars, layer statistics and events, incident records), and the other kinds
reuse its reader of JSON files. Every part is optional; what is missing is named.
"""

import json
import re
from pathlib import Path

import numpy as np

from scaledrill.errors import is_number
from scaledrill.report import figures as fg
from scaledrill.report.html import Section, absent, collapsed, figure, key_values, paragraph, table, verdict
from scaledrill.report.numbers import count, duration, number
from scaledrill.telemetry.store import read_events, read_layers, read_scalars

RUN_KEYS = ("task", "optimizer", "workers", "procs", "micro_batch", "accum", "global_batch", "backend", "sync",
            "steps", "samples_seen", "peak_lr", "final_loss", "noise_scale", "compression_ratio",
            "wire_bytes_per_worker_step", "mean_cosine_to_exact", "diverged", "stop_reason", "wall_seconds")  # fmt: skip
RUN_PLOTS = (  # (title, y label with its unit, scalar names, log y)
    ("Training loss", "training loss (task's loss units)", ("loss",), True),
    ("Learning-rate schedule", "learning rate (per step)", ("lr",), False),
    ("Gradient norm before and after clipping", "global L2 norm", ("grad_norm", "grad_norm_clipped"), True),
    ("Gradient noise scale", "B_simple (samples)", ("b_simple",), True),
    ("Compression fidelity", "vs the exact average (ratio)", ("cosine_to_exact", "rel_error_to_exact"), False),
    ("Bytes sent per worker per step", "bytes per worker per step", ("wire_bytes_per_worker",), False),
)
STEP_AXIS = "step (optimizer updates)"
HELD = ("b_simple",)  # estimated every few steps and held in between: drawn as its measurements
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


def flat_sentence(title: str, series) -> str:
    """What a figure of flat or single-point series would have shown, said in words."""
    parts = []
    for name, x, y in series:
        finite = [(s, v) for s, v in zip(x, y) if np.isfinite(v)]
        if not finite:
            parts.append(f"{name} never finite")
        elif len(finite) == 1:
            parts.append(f"{name} {number(finite[0][1])}, measured once (step {number(finite[0][0])})")
        else:
            parts.append(f"{name} {number(finite[0][1])} at every one of {len(finite)} logged steps")
    return f"{title}: {'; '.join(parts)} (no figure: nothing changes)."


def _store_blocks(store: Path) -> tuple[list[str], list[str]]:
    """Figures of a run store, and the names of what it does not hold; a series
    that never changes (or was measured once) is a sentence, not a figure."""
    if not store.is_file():
        return [], ["run.sqlite (no curves)"]
    scalars, blocks, missing = read_scalars(store), [], []
    for title, ylabel, names, logy in RUN_PLOTS:
        series = _series(scalars, names)
        if not series:
            missing.append(" / ".join(names))
            continue
        if all(fg.flat(y) for _, _, y in series):
            blocks.append(paragraph(flat_sentence(title, series), "note"))
            continue
        series = [(n, *fg.measurements(x, y)) if n in HELD else (n, x, y) for n, x, y in series]
        alt = f"{title}: {', '.join(s[0] for s in series)} against step"
        blocks.append(figure(fg.lines(title, series, xlabel=STEP_AXIS, ylabel=ylabel, logy=logy), alt))
    for name, label in HEATMAPS:
        steps, layers, matrix = read_layers(store, name)
        if not layers:
            missing.append(f"per-layer {name}")
            continue
        if fg.flat(matrix):
            value = np.asarray(matrix, dtype=float)
            value = value[np.isfinite(value)]
            shown = number(value[0]) if value.size else "never finite"
            blocks.append(paragraph(f"Per-layer {label}: {shown} in every one of {len(layers)} layers at every one of "
                                    f"{len(steps)} logged steps (no figure: nothing changes).", "note"))  # fmt: skip
            continue
        if len(steps) == 1:  # one column carries no heat: a table reads better
            rows = [(layer, number(value)) for layer, value in zip(layers, np.asarray(matrix, dtype=float)[0])]
            blocks.append(table(f"Per-layer {label} at step {steps[0]} (the one logged step)", ("layer", label), rows))
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
        if len(steps) == 1 or all(fg.flat(y) for _, _, y in series):
            blocks.append(paragraph(flat_sentence("Evaluation", series), "note"))
        else:
            alt = f"Evaluation metrics ({', '.join(metrics)}) against step"
            blocks.append(figure(fg.lines("Evaluation metrics", series, xlabel=STEP_AXIS,
                                          ylabel="metric value (loss units or fraction)"), alt))  # fmt: skip
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
    incidents = _incidents(directory)
    if summary:
        section.good, section.tag, section.summary = run_verdict(summary, incidents)
        section.blocks.append(verdict(section.good, section.summary))
    plots, not_stored = _store_blocks(directory / "run.sqlite")
    section.blocks += plots[:1]  # the loss first: it is what the reader came for
    if summary:
        shown = {k: _shown(k, summary[k]) for k in RUN_KEYS if k in summary}
        section.blocks.append(collapsed(f"Run summary ({len(shown)} keys)", key_values("Run summary", shown)))
    section.blocks += (_eval_blocks(summary) if summary else []) + plots[1:] + _incident_blocks(directory)
    section.blocks.append(absent(missing + not_stored))
    return section


def _shown(key: str, value):
    """Summary values for people: seconds as durations, byte counts with k/M."""
    if not is_number(value):
        return value
    if key.endswith("seconds"):
        return duration(value)
    if key.endswith("bytes_per_worker_step") or key == "samples_seen":
        return count(value)
    return value


def _incidents(directory: Path) -> list[dict]:
    docs = (load_json(p)[0] for p in sorted(directory.glob("incident-*.json")))
    return sorted((d for d in docs if d), key=lambda d: d.get("step") or 0)


def run_verdict(summary: dict, incidents: list[dict]) -> tuple[bool, str, str]:
    """(good, tag, sentence): finished or diverged, when, why, and where it started."""
    steps, final = summary.get("steps"), summary.get("final_loss")
    if summary.get("diverged"):
        first = incidents[0] if incidents else {}
        step = first.get("step", steps)
        why = first.get("reason") or summary.get("stop_reason") or "no reason recorded"
        where = f"; the first layer to go was {first['first_layer']}" if first.get("first_layer") else ""
        when = f" at step {step}" if step is not None else ""
        return False, "diverged", f"Diverged{when} ({why}){where}."
    loss = f", final training loss {number(final)}" if final is not None else ""
    wall = f" in {duration(summary['wall_seconds'])}" if summary.get("wall_seconds") is not None else ""
    reason = summary.get("stop_reason")
    why = f" (stopped: {reason})" if reason and reason not in ("finished", "done", "steps", None) else ""
    done = f" {steps} steps" if steps is not None else ""
    return True, "finished", f"Finished{done}{wall}{loss}{why}."
