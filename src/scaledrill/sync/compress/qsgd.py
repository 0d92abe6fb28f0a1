"""QSGD: stochastic rounding to s levels of the worker's norm.

Alistarh et al. 2017, "QSGD: Communication-Efficient SGD via Gradient
Quantization". Q(vᵢ) = ‖v‖₂ · sign(vᵢ) · ξᵢ, with ξᵢ = l/s or (l+1)/s where
l = floor(s·|vᵢ|/‖v‖₂), rounded up with probability s·|vᵢ|/‖v‖₂ − l. Unbiased;
the variance grows like min(n/s², √n/s)·‖v‖², so more levels (`sync.levels`)
for longer vectors. Here one norm covers the worker's whole flat gradient.

Steps, per worker:
1. norm = ‖v‖₂ (a zero vector sends zeros);
2. r = s·|v|/norm, l = floor(r), round up where u < r − l, u ~ U[0,1) drawn from
   (seed, step, global worker id);
3. send per entry a sign bit and a level of ceil(log2(s+1)) bits (plain fixed-width
   code, no Elias coding), plus the 4-byte norm.
"""

import math
from dataclasses import dataclass

import torch

from scaledrill.sync.compress import Out, Stateless


@dataclass(frozen=True)
class QSGD(Stateless):
    levels: int = 16

    def update(self, x, state, rnd):
        V, n = x.shape
        s = self.levels
        sent = torch.zeros_like(x)
        for v in range(V):
            norm = x[v].norm()  # 1.
            if norm == 0:
                continue
            r = x[v].abs() / norm * s  # 2.
            low = r.floor()
            u = torch.rand(n, generator=rnd.generator(v), dtype=x.dtype)
            sent[v] = norm * x[v].sign() * (low + (u < r - low).to(x.dtype)) / s
        bits = 1 + math.ceil(math.log2(s + 1))
        return Out(rnd.mean(sent), sent, math.ceil(n * bits / 8) + 4), state  # 3.
