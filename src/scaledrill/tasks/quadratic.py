"""The noisy quadratic model: a workload whose large-batch behaviour is known exactly.

Zhang et al. 2019, "Which Algorithmic Choices Matter at Which Batch Sizes?"
(NeurIPS 2019). Loss ½ Σ hᵢθᵢ²; a batch-B gradient of coordinate i is hᵢθᵢ plus
noise of variance cᵢ/B. Curvature hᵢ = 1/i; noise cᵢ = hᵢ, the covariance aligned
with the curvature (common practice, since the gradient covariance resembles the
Hessian near a minimum; the paper's choice too, from memory).

A training "sample" i is the noise vector ξᵢ ~ N(0, diag(c)) drawn by a counter-based
hash of i, so the stream is endless and layout-invariant. The helpers below give
plain SGD's expected loss in closed form, the steps it needs to reach a target,
and the simple noise scale of McCandlish et al. 2018.
"""

from dataclasses import dataclass, field

import numpy as np
import torch
from torch import nn

from scaledrill.errors import ConfigError, is_whole
from scaledrill.nn.keyed_random import hashed_normal


def spectrum(dim: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Curvature h and noise variance c (float64, [dim]): hᵢ = cᵢ = 1/i."""
    h = 1.0 / torch.arange(1, dim + 1, dtype=torch.float64)
    return h, h.clone()


@dataclass
class NoiseStream:
    """Endless stream: sample i is ξᵢ = sqrt(c) ⊙ z with z a hashed standard normal."""

    seed: int
    noise_std: torch.Tensor  # sqrt(c), float32 [dim]
    size: int | None = field(default=None, init=False)

    def take(self, index: torch.Tensor) -> dict[str, torch.Tensor]:
        z = hashed_normal(self.seed, index, self.noise_std.shape[0])
        return {"input": z * self.noise_std}


class QuadraticData:
    def __init__(self, dim: int = 100, theta0: float = 1.0, seed: int = 0):
        if not is_whole(dim) or dim < 1:
            raise ConfigError("task.data.dim", "must be a positive whole number", dim)
        self.dim, self.theta0, self.seed = dim, float(theta0), seed
        self.h, self.c = spectrum(dim)
        self.train = NoiseStream(seed, self.c.sqrt().to(torch.float32))

    def evaluate(self, model) -> dict[str, float]:
        """The exact (noiseless) loss ½ Σ hᵢθᵢ² at the model's θ."""
        theta = model.theta.detach().to(torch.float64)
        return {"loss": float(0.5 * (self.h * theta.square()).sum())}


def _moments(h, c, theta0, lr, batch):
    """Per coordinate: h, r = (1 − αh)², E[θ₀²], per-step added variance α²c/B."""
    h = np.asarray(h, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    start = np.broadcast_to(np.asarray(theta0, dtype=np.float64), h.shape) ** 2
    return h, (1.0 - lr * h) ** 2, start, lr * lr * c / batch


def expected_loss(h, c, theta0, lr: float, batch: int, steps):
    """E[L_t] for plain SGD after `steps` steps (scalar or array of steps).

    E[θ²ₜ₊₁] = r·E[θ²ₜ] + α²c/B with r = (1 − αh)², so
    E[θ²ₜ] = rᵗ·θ₀² + (1 − rᵗ)·αc / (B·h·(2 − αh)) (Zhang et al. 2019; docs/references.md, "Noisy quadratic model"),
    and E[Lₜ] = ½ Σ h·E[θ²ₜ]. At r = 1 the variance grows by α²c/B a step.
    """
    h, r, start, added = _moments(h, c, theta0, lr, batch)
    t = np.asarray(steps, dtype=np.float64)[..., None]
    one = np.isclose(r, 1.0)
    floor = np.where(one, 0.0, added / np.where(one, 1.0, 1.0 - r))
    second = np.where(one, start + t * added, r**t * (start - floor) + floor)
    return 0.5 * (h * second).sum(-1)


def steps_to_target(h, c, theta0, lr: float, batch: int, target: float, max_steps: int = 10**6):
    """The smallest t with E[L_t] <= target, or None if SGD never gets there."""
    loss = lambda t: expected_loss(h, c, theta0, lr, batch, t)  # noqa: E731
    if loss(0) <= target:
        return 0
    h, r, start, added = _moments(h, c, theta0, lr, batch)
    if lr <= 0 or np.any(lr * h >= 2.0):
        return None  # θ stands still or some coordinate's variance grows without bound
    floor = added / (1.0 - r)
    if np.all(start >= floor):  # every coordinate decays toward its floor: E[L_t] is monotone
        if 0.5 * (h * floor).sum() >= target:
            return None
        hi = 1
        while loss(hi) > target:
            hi *= 2
        lo = hi // 2
        while hi - lo > 1:
            mid = (lo + hi) // 2
            lo, hi = (lo, mid) if loss(mid) <= target else (mid, hi)
        return hi
    for begin in range(0, max_steps, 4096):  # some coordinates rise: scan
        t = np.arange(begin, min(begin + 4096, max_steps + 1))
        hit = np.nonzero(loss(t) <= target)[0]
        if hit.size:
            return int(t[hit[0]])
    return None


def b_simple(h, c, theta) -> float:
    """Simple noise scale tr(Σ)/|G|² = Σc / Σ(hθ)² (McCandlish et al. 2018, arXiv 1812.06162)."""
    h, c = np.asarray(h, dtype=np.float64), np.asarray(c, dtype=np.float64)
    gradient = h * np.broadcast_to(np.asarray(theta, dtype=np.float64), h.shape)
    return float(c.sum() / np.square(gradient).sum())


# The noisy quadratic model as a module (Zhang et al. 2019, NeurIPS).
#
# One parameter vector θ; a "sample" is a noise vector ξ ~ N(0, diag(c)), and its
# loss is ½ Σ hᵢθᵢ² + ξ·θ. The batch-mean gradient is then hθ plus noise of
# variance c/B per coordinate: the model's assumption, exactly, with no data.


class NoisyQuadratic(nn.Module):
    def __init__(self, dim: int = 100, theta0: float = 1.0):
        super().__init__()
        h, _ = spectrum(dim)
        self.theta = nn.Parameter(torch.full((dim,), float(theta0)))
        self.register_buffer("h", h.to(torch.float32), persistent=False)

    def forward(self, xi: torch.Tensor) -> torch.Tensor:
        """xi: [n, dim] -> per-sample losses [n]."""
        return 0.5 * (self.h * self.theta.square()).sum() + xi @ self.theta

    def loss(self) -> torch.Tensor:
        """The noiseless loss ½ Σ hᵢθᵢ²."""
        return 0.5 * (self.h * self.theta.square()).sum()
