"""One ladder from rungs trained apart: the ladder.json payload and the gathering of several.

Why: the rungs of a ladder need not train in one process or on one machine. Run
as separate jobs (Hydra's `-m` over `ladder.batches=[B]` with a launcher plugin:
joblib on one machine, a cluster launcher on a cluster), each job writes a
ladder.json of its own rungs; the fit of McCandlish et al. 2018 needs them all.
`gather` puts them back together: the rungs by batch, the fit and each rung's
regime recomputed over all of them, exactly as one `scaledrill ladder` would
have written them. Ladders aimed at different targets are not one ladder and
are refused.
"""

import math
import statistics

from scaledrill.ladder.fit import fit_tradeoff, regime


def _finite(value):
    return value if value is not None and math.isfinite(value) else None


def ladder_payload(mode: str, target: dict, results: list[dict], searches: dict | None) -> dict:
    """The ladder.json payload: rungs by batch, the fit over rungs that reached the target."""
    rungs = sorted(results, key=lambda r: r["global_batch"])
    hit = [r for r in rungs if r["steps_to_target"] and not r["diverged"] and not r.get("error")]
    fit = fit_tradeoff([r["global_batch"] for r in hit], [r["steps_to_target"] for r in hit]) if len(hit) >= 2 else None
    for r in rungs:
        r["regime"] = regime(r["global_batch"], fit) if fit and not r.get("error") else None
    noise = [r["noise_scale"] for r in rungs if r.get("noise_scale") is not None]
    return {
        "mode": mode,
        "target": target,
        "rungs": rungs,
        "fit": None if fit is None else {k: _finite(getattr(fit, k)) for k in ("s_min", "e_min", "b_noise", "b_crit", "residual")},
        "noise_scale_measured": statistics.median(noise) if noise else None,
        "search": None if searches is None else {str(b): searches[b] for b in sorted(searches, key=float)},
    }


def gather(docs: list[dict]) -> dict:
    """One payload from several ladder.json documents of the same target and mode; a batch
    trained by two jobs keeps the first one's rung."""
    aims = {(d.get("mode"), str(d.get("target"))) for d in docs}
    if len(aims) != 1:
        raise ValueError(f"ladders with different modes or targets cannot be gathered: {sorted(aims)}")
    rungs, searches = {}, {}
    for doc in docs:
        for rung in doc.get("rungs", []):
            rungs.setdefault(rung["global_batch"], dict(rung))
        for batch, entry in (doc.get("search") or {}).items():
            searches.setdefault(batch, entry)
    return ladder_payload(docs[0].get("mode"), docs[0].get("target"), list(rungs.values()), searches or None)
