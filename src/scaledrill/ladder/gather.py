"""One ladder from rungs trained apart: the ladder.json payload and the gathering of several.

Why: the rungs of a ladder need not train in one process or on one machine. Run
as separate jobs (Hydra's `-m` over `ladder.batches=[B]` with a launcher plugin:
joblib on one machine, a cluster launcher on a cluster), each job writes a
ladder.json of its own rungs; the fit of McCandlish et al. 2018 needs them all.
`gather` puts them back together: the rungs by batch, the fit and each rung's
regime recomputed over all of them, exactly as one `scaledrill ladder` would
have written them. Ladders aimed at different goals are not one ladder and
are refused.
"""

import math
import statistics

from scaledrill.ladder.fit import fit_tradeoff, regime


def _finite(value):
    return value if value is not None and math.isfinite(value) else None


DISAGREE = 2.0  # B_crit and the measured noise scale further apart than this factor are flagged (common practice)


def agreement(b_crit: float | None, noise: float | None) -> dict | None:
    """How far the fitted B_crit and the measured noise scale are apart, and whether that is worth a flag.

    McCandlish et al. 2018 ("An Empirical Model of Large-Batch Training") find the
    simple noise scale predicts the critical batch roughly, not exactly: it grows as
    training proceeds, and B_crit here comes from a fit over few rungs.
    """
    if not b_crit or not noise:
        return None
    ratio = max(b_crit, noise) / min(b_crit, noise)
    return {"ratio": ratio, "flagged": ratio > DISAGREE}


def ladder_payload(grow: str, goal: dict, goal_source: str, results: list[dict], searches: dict | None,
                   limits: dict | None = None, check_every: int | None = None) -> dict:
    """The ladder.json payload: rungs by batch, the fit over rungs that reached the goal.

    A rung that reached the goal at its first check (step `check_every`) only says "at most that
    many steps": it is left out of the fit (`first_check` lists them), or every rung of an easy
    goal would sit at the same step and the fit would read a plateau that was never measured."""
    rungs = sorted(results, key=lambda r: r["global_batch"])
    hit = [r for r in rungs if r["steps_to_target"] and not r["diverged"] and not r.get("error")]
    first = [r for r in hit if check_every and r["steps_to_target"] <= check_every]
    hit = [r for r in hit if r not in first]
    fit = fit_tradeoff([r["global_batch"] for r in hit], [r["steps_to_target"] for r in hit]) if len(hit) >= 2 else None
    for r in rungs:
        r["regime"] = regime(r["global_batch"], fit) if fit and r in hit else None  # a missed goal has no regime
        if limits is not None:
            r["step_limit"] = limits.get(r["global_batch"])
    noise = [r["noise_scale"] for r in rungs if r.get("noise_scale") is not None]
    measured = statistics.median(noise) if noise else None
    return {
        "grow": grow,
        "goal": goal,
        "goal_source": goal_source,
        "rungs": rungs,
        "check_every": check_every,
        "first_check": [r["global_batch"] for r in first],
        "fit": None if fit is None else {k: _finite(getattr(fit, k)) for k in ("s_min", "e_min", "b_noise", "b_crit", "residual")},
        "noise_scale_measured": measured,
        "agreement": agreement(None if fit is None else _finite(fit.b_crit), measured),
        "search": None if searches is None else {str(b): searches[b] for b in sorted(searches, key=float)},
    }


def gather(docs: list[dict]) -> dict:
    """One payload from several ladder.json documents of the same goal and growth; a batch
    trained by two jobs keeps the first one's rung."""
    aims = {(d.get("grow"), str(d.get("goal"))) for d in docs}
    if len(aims) != 1:
        raise ValueError(f"ladders with different growths or goals cannot be gathered: {sorted(aims)}")
    rungs, searches = {}, {}
    for doc in docs:
        for rung in doc.get("rungs", []):
            rungs.setdefault(rung["global_batch"], dict(rung))
        for batch, entry in (doc.get("search") or {}).items():
            searches.setdefault(batch, entry)
    first = docs[0]
    return ladder_payload(first.get("grow"), first.get("goal"), first.get("goal_source", "ladder.goal"),
                          list(rungs.values()), searches or None, check_every=first.get("check_every"))
