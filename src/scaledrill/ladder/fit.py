"""The steps/examples trade-off fitted to a batch-size ladder.

Why: a ladder measures steps-to-target S at a few batch sizes B; the model of
McCandlish, Kaplan, Amodei et al. 2018 ("An Empirical Model of Large-Batch
Training", arXiv 1812.06162) turns those few points into the whole curve:

    S = S_min · (1 + B_noise / B)        steps
    E = E_min · (1 + B / B_noise)        examples, E = S · B
    E_min = S_min · B_noise,  B_crit = E_min / S_min  (= B_noise under this model)

At B = B_crit a run takes 2·S_min steps and 2·E_min examples.

Fit: S is linear in x = 1/B, S = a + b·x with a = S_min and b = S_min·B_noise =
E_min. Steps-to-target is noisy in proportion to its size, so the fit minimises
the relative error Σ((a + b·xᵢ − Sᵢ)/Sᵢ)², a weighted linear least squares,
solved with a ≥ 0, b ≥ 0 by scipy.optimize.lsq_linear. Exact data from the
formula is recovered exactly; two rungs determine the line.
"""

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import lsq_linear

# Regime thresholds, in units of B_crit (common practice, not from Shallue et al.
# 2018, who name the regimes but draw no fixed lines). Under the model above:
# below 0.5·B_crit a run needs at most 1.5·E_min examples (close to perfect
# scaling); above 5·B_crit it needs at most 1.2·S_min steps (more batch buys little).
PERFECT_BELOW = 0.5
PLATEAU_ABOVE = 5.0


@dataclass(frozen=True)
class Fit:
    s_min: float  # fewest steps, at infinite batch
    e_min: float  # fewest examples, at batch → 0
    b_noise: float  # inf when steps fall as 1/B over every rung (no plateau seen yet)
    b_crit: float
    residual: float  # root-mean-square relative error of the fitted steps


def fit_tradeoff(batches, steps) -> Fit:
    """Fit S = S_min(1 + B_noise/B) to (batch, steps-to-target) pairs of a ladder.

    Needs at least two rungs at different batch sizes, every batch and step count
    finite and > 0 (leave out rungs that never reached the target).
    """
    b = np.asarray(batches, dtype=float).ravel()
    s = np.asarray(steps, dtype=float).ravel()
    if b.shape != s.shape:
        raise ValueError(f"batches and steps differ in length ({b.size} vs {s.size})")
    if not (np.all(np.isfinite(b)) and np.all(np.isfinite(s)) and np.all(b > 0) and np.all(s > 0)):
        raise ValueError("every batch and steps-to-target must be finite and > 0; drop rungs that missed the target")
    if np.unique(b).size < 2:
        raise ValueError(f"the fit needs rungs at >= 2 different batch sizes, got {np.unique(b).size}")
    design = np.column_stack([1.0 / s, 1.0 / (b * s)])  # rows (a + b/B)/S, target 1
    solution = lsq_linear(design, np.ones_like(s), bounds=(0.0, np.inf), method="bvls", tol=1e-15)
    s_min, e_min = (float(v) for v in solution.x)
    if s_min <= 1e-12 * float(s.max()):  # rounding dust: steps fall as 1/B throughout
        s_min = 0.0
    b_noise = e_min / s_min if s_min > 0 else math.inf
    relative = design @ solution.x - 1.0
    return Fit(s_min=s_min, e_min=e_min, b_noise=b_noise, b_crit=b_noise, residual=float(np.sqrt(np.mean(relative**2))))


def predicted_steps(fit: Fit, batch: float) -> float:
    """S(B) = S_min + E_min / B (the model, written so B_noise = inf still works)."""
    return fit.s_min + fit.e_min / batch


def predicted_examples(fit: Fit, batch: float) -> float:
    """E(B) = S(B) · B = E_min + S_min · B."""
    return fit.e_min + fit.s_min * batch


def regime(batch: float, fit: Fit) -> str:
    """'perfect scaling', 'diminishing returns' or 'plateau' (Shallue et al. 2018,
    "Measuring the Effects of Data Parallelism on Neural Network Training"), with
    the thresholds PERFECT_BELOW and PLATEAU_ABOVE of B_crit above."""
    if batch < PERFECT_BELOW * fit.b_crit:
        return "perfect scaling"
    if batch > PLATEAU_ABOVE * fit.b_crit:
        return "plateau"
    return "diminishing returns"
