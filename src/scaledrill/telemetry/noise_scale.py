"""The gradient noise scale B_simple = tr(Σ)/|G|², measured during training.

Why: B_simple predicts the critical batch size, the batch beyond which a bigger
batch buys few fewer steps (McCandlish, Kaplan, Amodei et al. 2018, "An Empirical
Model of Large-Batch Training", arXiv 1812.06162). Data-parallel training gets it
almost for free, because it already holds gradients at two batch sizes.

How (appendix A of the paper). A gradient averaged over B samples satisfies
E|G_B|² = |G|² + tr(Σ)/B. With a small batch B_small and a big batch B_big:

1. |G|² ≈ (B_big·|G_big|² − B_small·|G_small|²) / (B_big − B_small)
2. tr(Σ) ≈ (|G_small|² − |G_big|²) / (1/B_small − 1/B_big)
3. Both are unbiased but very noisy one step at a time, so each is smoothed by
   its own exponential moving average, with the start-up bias of the average
   divided out (as in Adam's moment estimates).
4. B_simple = smoothed tr(Σ) / smoothed |G|², undefined while |G|² <= 0.

In data-parallel training B_small is the batch of one worker (b·k samples) and
|G_small|² the MEAN over workers of each worker's squared gradient norm, taken
before averaging; B_big is the global batch and |G_big|² the squared norm of the
averaged gradient. Any two batch sizes work (e.g. one process's gradient before
the all-reduce), as long as both norms are taken before clipping or compression.

Tuning: `decay` trades lag for noise. 0.95 averages over ~20 steps; raise it
(0.99) when W is small, since the estimate of step 2 then has few workers behind it.
"""

import math
from dataclasses import asdict, dataclass


def estimate_g2(small_sq: float, b_small: float, big_sq: float, b_big: float) -> float:
    """Step 1: the unbiased one-step estimate of |G|²."""
    return (b_big * big_sq - b_small * small_sq) / (b_big - b_small)


def estimate_trace(small_sq: float, b_small: float, big_sq: float, b_big: float) -> float:
    """Step 2: the unbiased one-step estimate of tr(Σ), the per-sample gradient variance."""
    return (small_sq - big_sq) / (1.0 / b_small - 1.0 / b_big)


@dataclass
class NoiseScale:
    """Smoothed |G|², tr(Σ) and their ratio; every field is a plain number for exact resume."""

    decay: float = 0.95  # telemetry.noise_decay, in [0, 1) (config/rules.py)
    g2_sum: float = 0.0  # EMA accumulators, still carrying the start-up bias
    trace_sum: float = 0.0
    weight: float = 0.0  # 1 − decay^updates: what the accumulators must be divided by
    updates: int = 0
    skipped: int = 0  # steps with a non-finite input, left out of the averages

    def update(self, small_sq: float, b_small: float, big_sq: float, b_big: float) -> float | None:
        """Fold in one step's two squared norms; returns the current B_simple (or None)."""
        if not b_big > b_small > 0:
            raise ValueError(f"need 0 < b_small < b_big, got b_small={b_small}, b_big={b_big}")
        g2 = estimate_g2(small_sq, b_small, big_sq, b_big)
        trace = estimate_trace(small_sq, b_small, big_sq, b_big)
        if not (math.isfinite(g2) and math.isfinite(trace)):
            self.skipped += 1  # a NaN would poison the average for good; the detectors report it
            return self.b_simple
        # step 3
        d = self.decay
        self.g2_sum = d * self.g2_sum + (1.0 - d) * g2
        self.trace_sum = d * self.trace_sum + (1.0 - d) * trace
        self.weight = d * self.weight + (1.0 - d)
        self.updates += 1
        return self.b_simple

    @property
    def g2(self) -> float:
        """Smoothed |G|² (NaN before the first update)."""
        return self.g2_sum / self.weight if self.weight > 0 else math.nan

    @property
    def trace(self) -> float:
        """Smoothed tr(Σ) (NaN before the first update)."""
        return self.trace_sum / self.weight if self.weight > 0 else math.nan

    @property
    def b_simple(self) -> float | None:
        """Step 4. None while the smoothed |G|² is not positive (noise swamps the signal)."""
        g2 = self.g2
        if not g2 > 0:
            return None
        return self.trace / g2

    def scalars(self) -> dict[str, float]:
        """What the run store logs each step; NaN stands for 'not yet defined'."""
        b = self.b_simple
        return {"noise_g2": self.g2, "noise_trace": self.trace, "b_simple": math.nan if b is None else b}

    def state_dict(self) -> dict:
        return asdict(self)

    def load_state_dict(self, state: dict) -> None:
        for key, value in state.items():
            setattr(self, key, value)
