"""The noisy quadratic model as a module (Zhang et al. 2019, NeurIPS).

One parameter vector θ; a "sample" is a noise vector ξ ~ N(0, diag(c)), and its
loss is ½ Σ hᵢθᵢ² + ξ·θ. The batch-mean gradient is then hθ plus noise of
variance c/B per coordinate: the model's assumption, exactly, with no data.
"""

import torch
from torch import nn

from ..data.quadratic import spectrum


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
