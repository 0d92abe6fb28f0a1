"""The sweep kind of report section: several runs side by side.

Why: a sweep (Hydra's `-m`, which writes ./multirun/DATE/TIME/N/, or a handful of
run folders) asks one question, which setting is best and which ones break, and a
stack of separate run sections makes the reader assemble the answer. Here the
keys that differ between the runs are the columns, each run is a row with its
final numbers, the best and the unstable rows are marked, and one figure
overlays every loss curve.

How:
1. the swept keys: from each run's .hydra/overrides.yaml (what the command line
   set) when every run has one, else from the leaves of each run's config.yaml;
   only keys whose values differ between the runs are kept;
2. one row per run: its settings, final training loss, final evaluation, steps,
   wall time, and whether it diverged;
3. best = the lowest final training loss among the runs that did not diverge
   (and ended on a finite loss); unstable = diverged or a non-finite final loss;
4. one overlay of the loss curves from each run store.
"""

import math
import os
from pathlib import Path

import numpy as np
from omegaconf import OmegaConf

from scaledrill.ladder.gather import gather
from scaledrill.report import figures as fg
from scaledrill.report.html import Section, absent, figure, paragraph, table
from scaledrill.report.numbers import duration, number
from scaledrill.report.run_section import STEP_AXIS, load_json
from scaledrill.telemetry.store import read_scalars

IGNORED = ("hydra.", "resume", "train.progress", "debug")  # where runs differ without it being the experiment


def _overrides(directory: Path) -> dict[str, str] | None:
    path = directory / ".hydra" / "overrides.yaml"
    if not path.is_file():
        return None
    pairs = [str(item).lstrip("+~").split("=", 1) for item in OmegaConf.load(path)]
    return {p[0]: p[1] if len(p) > 1 else "(removed)" for p in pairs}


def _leaves(node, prefix: str = "") -> dict[str, str]:
    if isinstance(node, dict):
        out = {}
        for key, value in node.items():
            out |= _leaves(value, f"{prefix}{key}.")
        return out
    return {prefix[:-1]: str(node)}


def _config(directory: Path) -> dict[str, str]:
    path = directory / "config.yaml"
    return _leaves(OmegaConf.to_container(OmegaConf.load(path), resolve=False)) if path.is_file() else {}


def swept_keys(directories: list[Path]) -> tuple[list[str], list[dict[str, str]]]:
    """Step 1: the keys that differ between the runs, and each run's settings."""
    given = [_overrides(d) for d in directories]
    settings = given if all(g is not None for g in given) else [_config(d) for d in directories]
    keys = sorted({k for s in settings for k in s if not k.startswith(IGNORED)})
    varied = [k for k in keys if len({s.get(k, "–") for s in settings}) > 1]
    return varied, settings


def _finite(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value)


def _label(keys: list[str], setting: dict[str, str], fallback: str) -> str:
    return ", ".join(f"{k.rsplit('.', 1)[-1] if len(keys) > 2 else k}={setting.get(k, '–')}" for k in keys) or fallback


def sweep_section(directories: list[Path], sources: list[str]) -> Section:
    """Runs side by side: swept keys, final numbers, best and unstable marked, loss overlay."""
    section = Section("sweep", f"Sweep of {len(directories)} runs", "")
    keys, settings = swept_keys(directories)
    summaries = [load_json(d / "summary.json")[0] or {} for d in directories]
    metrics = sorted({m for s in summaries for m in (s.get("eval") or {})})
    unstable = [bool(s.get("diverged")) or not _finite(s.get("final_loss")) for s in summaries]
    healthy = [i for i, s in enumerate(summaries) if not unstable[i]]
    best = min(healthy, key=lambda i: summaries[i]["final_loss"]) if healthy else None
    rows, classes = [], []
    for i, (source, setting, s) in enumerate(zip(sources, settings, summaries)):
        verdict = "best" if i == best else "diverged" if s.get("diverged") else "unstable" if unstable[i] else ""
        evals = [(s.get("eval") or {}).get(m) for m in metrics]
        rows.append((source, *(setting.get(k, "–") for k in keys), s.get("final_loss"), *evals, s.get("steps"),
                     duration(s.get("wall_seconds")), str(s.get("stop_reason") or "").split(":")[0], verdict))  # fmt: skip
        classes.append("pick" if i == best else "bad" if unstable[i] else "")
    headers = ("run", *keys, "final training loss", *(f"eval {m}" for m in metrics), "steps", "wall time",
               "stopped because", "verdict")  # fmt: skip
    labels = [_label(keys, setting, source) for setting, source in zip(settings, sources)]
    section.summary = _sentence(keys, labels, summaries, best, unstable)
    section.good = None if any(unstable) else best is not None  # mixed news is neither good nor bad
    section.tag = f"best: {labels[best]}" if best is not None else "none stable"
    section.tag = section.tag if len(section.tag) <= 28 else section.tag[:27] + "…"
    section.blocks.append(paragraph(section.summary))
    section.blocks.append(table("The runs side by side (swept keys as columns; best and unstable marked)", headers,
                                rows, classes, len(headers) - 1))  # fmt: skip
    curves, calm = [], []
    for i, (label, directory) in enumerate(zip(labels, directories)):
        store = directory / "run.sqlite"
        scalars = read_scalars(store) if store.is_file() else {}
        if "loss" in scalars:
            curves.append((label, *scalars["loss"]))
            if not unstable[i]:
                calm.append(scalars["loss"][1])
    if len(curves) >= 2:
        alt = f"Training loss of {len(curves)} runs against step, overlaid"
        section.blocks.append(figure(fg.lines("Training loss of every run", curves, xlabel=STEP_AXIS,
                                              ylabel="training loss (task's loss units)", logy=True,
                                              ylim=_calm_range(calm) if len(calm) < len(curves) else None), alt))
        if len(calm) < len(curves):
            section.blocks.append(paragraph("The axis spans the runs that stayed stable; the unstable ones run off it.",
                                            "note"))  # fmt: skip
    no_keys = "a setting that differs between the runs (no overrides or config.yaml differ)"
    section.blocks.append(absent([] if keys else [no_keys]))
    return section


def _calm_range(calm: list) -> tuple[float, float] | None:
    values = np.concatenate([np.asarray(v, dtype=float) for v in calm]) if calm else np.array([])
    values = values[np.isfinite(values)]
    if values.size == 0:
        return None
    low, high = float(values.min()), float(values.max())
    pad = 0.08 * (high - low or abs(high) or 1.0)
    return (low / 1.3 if low > 0 else low - pad), (high * 1.3 if low > 0 else high + pad)


def _sentence(keys, labels, summaries, best, unstable) -> str:
    over = f" over {', '.join(keys)}" if keys else ""
    head = f"{len(summaries)} runs{over}"
    if best is None:
        return f"{head}: every run diverged or ended on a non-finite loss."
    broke = [labels[i] for i, bad in enumerate(unstable) if bad]
    tail = f"; unstable: {'; '.join(broke)}" if broke else "; none diverged"
    return f"{head}: best {labels[best]} (final training loss {number(summaries[best]['final_loss'])}){tail}."


def gathered_ladder(directories: list[Path], sources: list[str]) -> Section | None:
    """One ladder section over ladders trained as separate jobs (one `-m` job per rung), or
    None when they are not parts of one ladder: the same mode and target, no batch twice, and
    (when Hydra recorded them) the same overrides apart from the batches."""
    from scaledrill.report.sections import ladder_blocks

    docs = [load_json(d / "ladder.json")[0] for d in directories]
    if any(d is None for d in docs) or len({(d.get("grow"), str(d.get("goal"))) for d in docs}) != 1:
        return None
    batches = [r["global_batch"] for d in docs for r in d.get("rungs", [])]
    overrides = [_overrides(d) for d in directories]
    rest = [{k: v for k, v in o.items() if k not in ("ladder.batches", "ladder.rungs")} for o in overrides if o]
    if len(batches) != len(set(batches)) or any(r != rest[0] for r in rest):
        return None
    common = str(Path(os.path.commonpath(sources))) if all(s != "." for s in sources) else "."
    section = Section("ladder", f"Batch-size ladder gathered from {len(docs)} jobs", common)
    section = ladder_blocks(section, gather(docs))
    section.summary = f"Gathered from {len(docs)} jobs. {section.summary}"
    return section
