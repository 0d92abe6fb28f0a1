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
        n = x.shape[1]
        s = self.levels
        norm = x.norm(dim=1, keepdim=True)  # 1. (bitwise the per-row norm: each row reduces alone)
        u = torch.empty_like(x)
        for v, gen in enumerate(rnd.generators()):  # one stream per worker; only the draws stay per row
            u[v].uniform_(generator=gen)
        # 2., in place where the old value is not read again (same operations in the same order, so the same bits)
        r = x.abs().div_(norm).mul_(s)
        low = r.floor()
        up = u.lt_(r.sub_(low))  # 1.0 where u < r - l
        sent = x.sign().mul_(norm).mul_(low.add_(up)).div_(s)  # norm · sign(v) · ξ·s / s
        zero = norm == 0
        if zero.any():  # rare, and a broadcast masked fill costs as much as the rest of a row's arithmetic
            sent.masked_fill_(zero, 0.0)  # a zero vector sends zeros
        bits = 1 + math.ceil(math.log2(s + 1))
        return Out(rnd.mean(sent), sent, math.ceil(n * bits / 8) + 4), state  # 3.
