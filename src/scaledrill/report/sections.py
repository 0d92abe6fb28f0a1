"""One function per kind of directory (check, replay, ladder, forecast; run in run_section) → a Section.

Why one function per kind: each kind answers its own question (how did the run
go, do the gradient paths agree, where did the replay depart, where does scaling
stop, what will it cost), and each reads only its own files. Every function
renders what is there and says what is absent, so a half-finished or crashed
directory still gives a useful page.
"""

from pathlib import Path

import numpy as np

from scaledrill.errors import DataError
from scaledrill.forecast import CAUTION
from scaledrill.replay.cluster_log import read_cluster_log
from scaledrill.report import figures as fg
from scaledrill.report.html import Section, absent, figure, heading, key_values, paragraph, table, verdict
from scaledrill.report.run_section import load_json, run_section
from scaledrill.telemetry.store import read_scalars


def check_section(directory: Path, source: str) -> Section:
    """The equivalence check: verdict, per-path per-layer table, trajectory, diagnosis."""
    section = Section("check", "Equivalence check", source)
    doc, problem = load_json(directory / "check.json")
    if doc is None:
        section.blocks.append(absent([problem]))
        return section
    good = doc.get("verdict") == "match"
    section.blocks.append(verdict(good, f"verdict: {doc.get('verdict', 'unknown')}"))
    if doc.get("tolerance_rule"):
        section.blocks.append(paragraph(f"Tolerance rule: {doc['tolerance_rule']}"))
    rows, classes, trajectories = [], [], []
    for path in doc.get("paths", []):
        for layer in path.get("layers", []):
            ok = bool(layer.get("ok"))
            rows.append((path.get("name"), layer.get("layer"), layer.get("max_abs"), layer.get("max_rel"),
                         layer.get("tolerance"), "within" if ok else "OUTSIDE"))  # fmt: skip
            classes.append("ok" if ok else "bad")
        t = path.get("trajectory")
        if t:
            trajectories.append((path.get("name"), t.get("steps"), t.get("max_abs"), t.get("tolerance"), t.get("ok")))
    headers = ("path", "layer", "max abs diff", "max rel diff", "tolerance", "result")
    section.blocks.append(table("Gradient of each path vs the true large batch, per layer", headers, rows, classes, 5))
    if trajectories:
        classes = ["ok" if t[-1] else "bad" for t in trajectories]
        rows = [(*t[:-1], "within" if t[-1] else "OUTSIDE") for t in trajectories]
        section.blocks.append(table("Parameter trajectory after several steps", ("path", "steps", "max abs diff",
                                    "tolerance", "result"), rows, classes, 4))  # fmt: skip
    diagnosis = doc.get("diagnosis") or []
    if diagnosis:
        rows = [(d.get("cause"), d.get("evidence"), d.get("fix")) for d in diagnosis]
        section.blocks.append(table("Diagnosis: likely causes of the mismatch", ("cause", "evidence", "fix"), rows))
    return section


def _cluster_log(path: Path) -> tuple[dict, str | None]:
    """(label -> column against step, problem): the log through the replay's own checked reader."""
    try:
        log = read_cluster_log(path)
    except DataError as err:
        return {}, f"cluster log ({err})"
    steps = log.steps.astype(np.float64)
    columns = {"loss": log.loss, "grad_norm": log.grad_norm, "lr": log.lr}
    return {name: (steps, values) for name, values in columns.items() if values is not None}, None


def _original_run(checkpoint: Path) -> Path | None:
    """The run directory a checkpoint belongs to: its nearest ancestor with a run store."""
    for parent in list(checkpoint.parents)[:4]:
        if (parent / "run.sqlite").is_file():
            return parent
    return None


def replay_section(directory: Path, source: str) -> Section:
    """A replay: each variant's curve beside the original run and the cluster log."""
    section = Section("replay", "Replay from a checkpoint", source)
    doc, problem = load_json(directory / "replay.json")
    if doc is None:
        section.blocks.append(absent([problem]))
        return section
    variants, missing = doc.get("variants", []), []
    curves = {}
    checkpoint = str(doc.get("checkpoint") or "")
    from_step = doc.get("from_step")
    original = _original_run(directory / checkpoint) or (_original_run(Path(checkpoint)) if checkpoint else None)
    before_label = f"run before step {from_step}"
    if original is not None:  # the rehearsal up to the resume point, as the command line draws it
        curves[before_label] = {k: _upto(v, from_step) for k, v in read_scalars(original / "run.sqlite").items()}
    for v in variants:
        store = directory / str(v.get("run_dir", "")) / "run.sqlite"
        if store.is_file():
            curves[str(v.get("name"))] = read_scalars(store)
        else:
            missing.append(f"run store of variant {v.get('name')}")
    log = directory / str(doc.get("cluster_log") or "cluster_log.csv")
    if doc.get("cluster_log") and not log.is_file():
        log = Path(str(doc["cluster_log"]))
    columns, problem = _cluster_log(log) if log.is_file() else ({}, "cluster log")
    if columns:
        curves["cluster log"] = columns
    else:
        missing.append(problem)
    departure = doc.get("departure_step")
    rows = []
    for v in variants:
        loss = curves.get(str(v.get("name")), {}).get("loss", ([], []))
        finite = [float(x) for x in loss[1] if np.isfinite(x)]
        vs_log = "" if not columns or v.get("name") != "original" else (
            f"departs at step {departure}" if departure is not None else "follows")
        rows.append((v.get("name"), " ".join(v.get("overrides", [])) or "-", v.get("final_loss"),
                     min(finite) if finite else None, v.get("diverged"), int(loss[0][-1]) + 1 if len(loss[0]) else None,
                     vs_log))
    headers = ("variant", "overrides", "final loss", "min loss", "diverged", "steps", "vs cluster log")
    section.blocks.append(table(f"Variants resumed at step {from_step} from {doc.get('checkpoint')}", headers, rows,
                                ["bad" if r[4] else "" for r in rows]))  # fmt: skip
    if columns:
        said = f"departs from the cluster log at step {departure}" if departure is not None else "follows the cluster log"
        section.blocks.append(verdict(departure is None, f"the unchanged replay {said}"))
    marks = [(from_step, f"resumed at {from_step}")] if from_step is not None else []
    if departure is not None:
        marks.append((departure, f"departs at {departure}"))
    for name, ylabel in (("loss", "loss"), ("grad_norm", "global gradient norm")):
        series = [(label, *scalars[name]) for label, scalars in curves.items() if name in scalars]
        if series:
            alt = f"{ylabel} of {', '.join(s[0] for s in series)} against step, resume and departure marked"
            section.blocks.append(figure(fg.lines(f"Replay: {ylabel}", series, ylabel=ylabel, logy=True,
                                                  marks=marks, distinct=True), alt))  # fmt: skip
    section.blocks.append(absent(missing))
    return section


def _upto(series: tuple, step) -> tuple:
    steps, values = series
    keep = np.asarray(steps) < step if step is not None else np.ones(len(steps), bool)
    return np.asarray(steps)[keep], np.asarray(values)[keep]


def _search_rows(search: dict) -> list:
    rows = []
    for batch in sorted(search, key=float):
        entry = search[batch]
        trials = [(t["lr"], "diverged" if t.get("diverged") else "pruned" if t.get("pruned") else
                   "reached" if t.get("reached") else "missed") for t in entry.get("trials", [])]  # fmt: skip
        rows.append((int(float(batch)), trials, entry.get("window"), entry.get("best_lr")))
    return rows


def ladder_section(directory: Path, source: str) -> Section:
    """A batch-size ladder: steps-to-target vs batch with the fit, and the LR window."""
    section = Section("ladder", "Batch-size ladder", source)
    doc, problem = load_json(directory / "ladder.json")
    if doc is None:
        section.blocks.append(absent([problem]))
        return section
    rungs, fit, search = doc.get("rungs", []), doc.get("fit"), doc.get("search")
    headers = ("global batch", "lr", "steps to target", "samples to target", "final metric", "noise scale",
               "regime", "diverged", "wall s")  # fmt: skip
    keys = ("global_batch", "lr", "steps_to_target", "samples_to_target", "final_metric", "noise_scale", "regime",
            "diverged", "wall_seconds")  # fmt: skip
    rows = [tuple(r.get(k) for k in keys) for r in rungs]
    classes = ["bad" if r[7] else "" for r in rows]  # diverged rungs
    section.blocks.append(table(f"Rungs (grow: {doc.get('grow')})", headers, rows, classes))
    if fit:
        section.blocks.append(key_values("Fit S = S_min(1 + B_noise/B) (McCandlish et al. 2018)", fit))
    reached = sorted((r["global_batch"], r["steps_to_target"]) for r in rungs if r.get("steps_to_target"))
    missed = [r["global_batch"] for r in rungs if not r.get("steps_to_target")]
    if reached:
        curve = tuple(float(fit.get(k, "nan")) for k in ("s_min", "e_min", "b_crit")) if fit else None  # "Infinity" too
        uri = fg.scaling([b for b, _ in reached], [s for _, s in reached], missed, curve, reached[0])
        section.blocks.append(figure(uri, "Steps to target against global batch, log-log, with the perfect-scaling "
                                     "line and the fitted curve"))  # fmt: skip
    missing = [] if fit else ["fit (fewer than two rungs reached the target)"]
    if search:
        lr_rows = _search_rows(search)
        section.blocks.append(figure(fg.lr_windows(lr_rows), "Learning-rate trials and window per global batch"))
        section.blocks.append(table("Learning-rate search per rung", ("global batch", "best lr", "window", "trials",
                                    "samples spent"), [(b, best, w, len(t), search[k].get("samples_spent"))
                                    for (b, t, w, best), k in zip(lr_rows, sorted(search, key=float))]))  # fmt: skip
    else:
        missing.append("learning-rate search")
    section.blocks.append(absent(missing))
    return section


def forecast_section(directory: Path, source: str) -> Section:
    """A cluster forecast: time and cost per rung, the picks, assumptions and the caution."""
    section = Section("forecast", "Cluster forecast", source)
    doc, problem = load_json(directory / "forecast.json")
    if doc is None:
        section.blocks.append(absent([problem]))
        return section
    section.blocks.append(paragraph(doc.get("caution") or CAUTION, "caution"))
    rungs = doc.get("rungs", [])
    pick = lambda flag: next((i for i, r in enumerate(rungs) if r.get(flag)), None)  # noqa: E731
    cheapest, fastest = pick("cheapest"), pick("fastest")
    if rungs:
        hours = [None if r.get("time_to_target_s") is None else r["time_to_target_s"] / 3600 for r in rungs]
        panels = [("Step time", "seconds", [r.get("step_s") for r in rungs]), ("Time to target", "hours", hours),
                  ("Cost to target", "price units", [r.get("cost") for r in rungs])]  # fmt: skip
        uri = fg.forecast_bars([str(r.get("global_batch")) for r in rungs], panels, cheapest, fastest)
        section.blocks.append(figure(uri, "Projected step time, time to target and cost per global batch; "
                                     "cheapest and fastest marked"))  # fmt: skip
    keys = ("global_batch", "devices", "steps_to_target", "compute_s", "comm_s", "exposed_comm_s", "step_s",
            "time_to_target_s", "device_hours", "cost")  # fmt: skip
    rows = [(*(r.get(k) for k in keys), ", ".join(f for f in ("cheapest", "fastest") if r.get(f))) for r in rungs]
    headers = ("global batch", "devices", "steps to target", "compute s", "all-reduce s", "exposed s", "step s",
               "to target s", "device-hours", "cost", "pick")  # fmt: skip
    section.blocks.append(table("Projection per rung", headers, rows, ["pick" if r[-1] else "" for r in rows]))
    assumptions = doc.get("assumptions") or {}
    section.blocks.append(heading("Assumptions"))
    if assumptions.get("cluster"):
        section.blocks.append(key_values("Cluster as described", assumptions["cluster"]))
    inputs = {k: v for k, v in assumptions.items() if not isinstance(v, dict)}
    section.blocks.append(key_values("Inputs of the projection", inputs))
    for name, caption in (("sources", "Where each input came from"), ("rules", "Rules of the model")):
        if assumptions.get(name):
            section.blocks.append(key_values(caption, assumptions[name]))
    return section


BUILDERS = {"summary.json": run_section, "check.json": check_section, "replay.json": replay_section,
            "ladder.json": ladder_section, "forecast.json": forecast_section}  # fmt: skip
