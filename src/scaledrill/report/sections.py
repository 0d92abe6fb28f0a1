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
from scaledrill.report.html import Section, absent, collapsed, figure, heading, key_values, paragraph, table, verdict
from scaledrill.report.numbers import count, duration, duration_unit, number
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
    section.good, section.tag, section.summary = good, str(doc.get("verdict", "unknown")), check_sentence(doc)
    section.blocks.append(verdict(good, f"verdict: {doc.get('verdict', 'unknown')}"))
    if doc.get("tolerance_rule"):
        section.blocks.append(paragraph(f"Tolerance rule: {doc['tolerance_rule']}"))
    floor = (doc.get("reference") or {}).get("floor")
    if floor:
        section.blocks.append(paragraph(f"Rounding floor: {floor.removeprefix('rounding floor: ')}.", "note"))
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
    layers = table("Gradient of each path vs the true large batch, per layer", headers, rows, classes, 5)
    # on a match every row says "within": the detail stays one click away instead of filling the page
    section.blocks.append(collapsed(f"Every layer of every path ({len(rows)} rows)", layers) if good else layers)
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


def check_sentence(doc: dict) -> str:
    """Which paths were compared and, on a mismatch, the first named cause."""
    names = [str(p.get("name")) for p in doc.get("paths", [])]
    compared = f"{len(names)} gradient path{'s' if len(names) != 1 else ''} ({', '.join(names)})" if names else "the paths"
    if doc.get("verdict") == "match":
        return f"Every one of {compared} matches the true large-batch gradient within tolerance."
    off = {str(p.get("name")) for p in doc.get("paths", []) for layer in p.get("layers", []) if not layer.get("ok")}
    off |= {str(p.get("name")) for p in doc.get("paths", []) if (p.get("trajectory") or {}).get("ok") is False}
    causes = [d.get("cause") for d in doc.get("diagnosis") or [] if d.get("cause")]
    cause = f"; likely cause: {causes[0]}" if causes else "; no cause named"
    return f"Mismatch on {', '.join(sorted(off)) or 'some path'} of {compared}{cause}."


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
    section.good, section.tag, section.summary = replay_verdict(doc)
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


def replay_verdict(doc: dict) -> tuple[bool | None, str, str]:
    """Which variants ran through without diverging, and the best of them by final loss."""
    variants = doc.get("variants", [])
    held = [v for v in variants if not v.get("diverged")]
    start = f"Resumed at step {doc['from_step']}: " if doc.get("from_step") is not None else ""
    if not variants:
        return None, "no variants", start + "no variant was run."
    if not held:
        return False, "none fixed it", start + f"all {len(variants)} variants diverged again."
    best = min(held, key=lambda v: v["final_loss"] if v.get("final_loss") is not None else float("inf"))
    others = [str(v.get("name")) for v in held if v is not best]
    also = f" ({', '.join(others)} held too)" if others else ""
    failed = [str(v.get("name")) for v in variants if v.get("diverged")]
    again = f"; {', '.join(failed)} diverged again" if failed else ""
    return True, f"fixed: {best.get('name')}", (f"{start}variant {best.get('name')} fixed it with the lowest final "
                                                f"loss, {number(best.get('final_loss'))}{also}{again}.")  # fmt: skip


def _search_rows(search: dict) -> list:
    rows = []
    for batch in sorted(search, key=float):
        entry = search[batch]
        trials = [(t["lr"], "diverged" if t.get("diverged") else "pruned" if t.get("pruned") else
                   "reached" if t.get("reached") else "missed") for t in entry.get("trials", [])]  # fmt: skip
        rows.append((int(float(batch)), trials, entry.get("window"), entry.get("best_lr")))
    return rows


FIT_NAMES = {"s_min": "S_min (steps)", "e_min": "E_min (samples)", "b_noise": "B_noise (samples)",
             "b_crit": "B_crit = E_min/S_min (samples)", "residual": "fit residual (log steps, RMS)"}  # fmt: skip


def ladder_verdict(doc: dict) -> tuple[bool | None, str, str]:
    """The critical batch and the first rung past which doubling the batch stops paying."""
    rungs, fit = doc.get("rungs", []), doc.get("fit") or {}
    reached = [r for r in rungs if r.get("steps_to_target") and not r.get("diverged")]
    broke = [r["global_batch"] for r in rungs if r.get("diverged") or r.get("error")]
    tail = f"; diverged or failed at B={', '.join(str(b) for b in broke)}" if broke else ""
    first = doc.get("first_check") or []
    if not fit or fit.get("b_crit") is None:
        why = (f"; B={', '.join(str(b) for b in first)} reached it at the first check (step {doc.get('check_every')}), "
               "which only bounds their steps: lower ladder.check_every or set a harder goal") if first else ""
        return None, "no fit", (f"{len(reached)} of {len(rungs)} rungs reached the target: too few to place the "
                                f"critical batch{why}{tail}.")  # fmt: skip
    b_crit = fit["b_crit"]
    past = [r["global_batch"] for r in rungs if r.get("regime") in ("diminishing returns", "plateau")]
    where = (f"scaling stops paying from B={past[0]} (steps no longer halve when the batch doubles)" if past
             else f"every rung that reached the target, up to B={max(r['global_batch'] for r in reached)}, "
             "still scales almost perfectly")
    return not broke, f"B_crit ≈ {number(b_crit)}", f"Critical batch ≈ {number(b_crit)} samples; {where}{tail}."


def ladder_section(directory: Path, source: str) -> Section:
    """A batch-size ladder: steps-to-target vs batch with the fit, and the LR window."""
    section = Section("ladder", "Batch-size ladder", source)
    doc, problem = load_json(directory / "ladder.json")
    if doc is None:
        section.blocks.append(absent([problem]))
        return section
    return ladder_blocks(section, doc)


def ladder_blocks(section: Section, doc: dict) -> Section:
    """The ladder section's contents from a ladder.json payload (read, or gathered from jobs)."""
    rungs, fit, search = doc.get("rungs", []), doc.get("fit"), doc.get("search")
    section.good, section.tag, section.summary = ladder_verdict(doc)
    section.blocks.append(paragraph(section.summary))
    headers = ("global batch (samples)", "lr", "steps to target", "samples to target", "final metric",
               "noise scale (samples)", "regime", "diverged", "wall time")  # fmt: skip
    keys = ("global_batch", "lr", "steps_to_target", "samples_to_target", "final_metric", "noise_scale", "regime",
            "diverged", "wall_seconds")  # fmt: skip
    rows = [tuple(r.get(k) for k in keys[:-1]) + (duration(r.get("wall_seconds")),) for r in rungs]
    classes = ["bad" if r[7] else "" for r in rows]  # diverged rungs
    section.blocks.append(table(f"Rungs (grow: {doc.get('grow')})", headers, rows, classes))
    if fit:
        section.blocks.append(table("Fit S = S_min(1 + B_noise/B) (McCandlish et al. 2018)", ("quantity", "value"),
                                    [(FIT_NAMES.get(k, k), v) for k, v in fit.items()]))  # fmt: skip
    reached = sorted((r["global_batch"], r["steps_to_target"]) for r in rungs if r.get("steps_to_target"))
    missed = [r["global_batch"] for r in rungs if not r.get("steps_to_target")]
    if len(reached) == 1:
        section.blocks.append(paragraph(f"One rung reached the target (B={reached[0][0]} in {reached[0][1]} steps): "
                                        "no curve to draw until a second one does.", "note"))  # fmt: skip
    elif reached:
        curve = tuple(float(fit.get(k, "nan")) for k in ("s_min", "e_min", "b_crit")) if fit else None  # "Infinity" too
        uri = fg.scaling([b for b, _ in reached], [s for _, s in reached], missed, curve, reached[0])
        section.blocks.append(figure(uri, "Steps to target against global batch, log-log, with the perfect-scaling "
                                     "line and the fitted curve"))  # fmt: skip
    missing = [] if fit else ["fit (fewer than two rungs reached the target)"]
    if search:
        lr_rows = _search_rows(search)
        section.blocks.append(figure(fg.lr_windows(lr_rows), "Learning-rate trials and window per global batch"))
        section.blocks.append(table("Learning-rate search per rung", ("global batch (samples)", "best lr", "window",
                                    "trials", "samples spent"), [(b, best, w, len(t), count(search[k].get("samples_spent")))
                                    for (b, t, w, best), k in zip(lr_rows, sorted(search, key=float))]))  # fmt: skip
    else:
        missing.append("learning-rate search")
    section.blocks.append(absent(missing))
    return section


def _scaled(seconds: list) -> tuple[str, list]:
    """An axis label and the values in the one time unit that suits them."""
    unit, size = duration_unit(seconds)
    return f"time ({unit})", [None if v is None else v / size for v in seconds]


def forecast_verdict(rungs: list[dict], cheapest: int | None, fastest: int | None,
                     baseline: dict | None = None) -> tuple[bool | None, str, str]:
    """The cheapest and the fastest rung, each with its cost and its speed-up over the baseline
    (job.baseline's batch on its own devices) or, without one, over the smallest batch."""
    base = baseline or (rungs[0] if rungs else None)
    if base is None or (cheapest is None and fastest is None):
        return None, "no pick", "No rung reaches the target on this cluster, so there is nothing to price."
    against = (f"the baseline (B={base['global_batch']} on {base.get('devices')} devices)" if baseline
               else f"B={base['global_batch']}")  # fmt: skip

    def told(i: int) -> str:
        r = rungs[i]
        t, t0 = r.get("time_to_target_s"), base.get("time_to_target_s")
        speed = f", {number(t0 / t)}× the speed of {against}" if t and t0 and r is not base else ""
        cost = f" ({number(r['cost_ratio'])}× its cost)" if baseline and r.get("cost_ratio") is not None else ""
        return f"B={r['global_batch']} on {r.get('devices')} devices: {duration(t)} to target, cost {number(r.get('cost'))}{speed}{cost}"

    if cheapest == fastest:
        return True, f"pick B={rungs[cheapest]['global_batch']}", f"Cheapest and fastest: {told(cheapest)}."
    parts = [f"{name} {told(i)}" for name, i in (("cheapest", cheapest), ("fastest", fastest)) if i is not None]
    return True, "cheapest ≠ fastest", ("; ".join(parts) + ".").capitalize()


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
    baseline = doc.get("baseline")
    section.good, section.tag, section.summary = forecast_verdict(rungs, cheapest, fastest, baseline)
    section.blocks.insert(0, paragraph(section.summary))
    if rungs:
        panels = [("Step time", *_scaled([r.get("step_s") for r in rungs])),
                  ("Time to target", *_scaled([r.get("time_to_target_s") for r in rungs])),
                  ("Cost to target", "cost (price units)", [r.get("cost") for r in rungs])]  # fmt: skip
        uri = fg.forecast_bars([str(r.get("global_batch")) for r in rungs], panels, cheapest, fastest)
        section.blocks.append(figure(uri, "Projected step time, time to target and cost per global batch; "
                                     "cheapest and fastest marked"))  # fmt: skip
    times = ("compute_s", "comm_s", "exposed_comm_s", "step_s", "time_to_target_s")
    ratios = lambda r: (number(r.get("speed_up")), number(r.get("cost_ratio"))) if baseline else ()  # noqa: E731
    rows = [(r.get("global_batch"), r.get("devices"), r.get("steps_to_target"), *(duration(r.get(k)) for k in times),
             r.get("device_hours"), r.get("cost"), *ratios(r),
             ", ".join(f for f in ("baseline", "cheapest", "fastest") if r.get(f)))
            for r in ([baseline] if baseline else []) + rungs]  # fmt: skip
    headers = ("global batch (samples)", "devices", "steps to target", "compute per step", "all-reduce per step",
               "exposed all-reduce", "step time", "time to target", "device-hours (h)", "cost (price units)",
               *(("speed-up vs baseline (×)", "cost vs baseline (×)") if baseline else ()), "pick")  # fmt: skip
    classes = ["pick" if r[-1] and r[-1] != "baseline" else "" for r in rows]
    caption = "Projection per rung, the baseline first" if baseline else "Projection per rung"
    section.blocks.append(table(caption, headers, rows, classes))
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
