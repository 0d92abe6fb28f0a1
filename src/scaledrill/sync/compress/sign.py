"""Scaled sign: one bit per entry and one scale per worker.

Karimireddy et al. 2019, "Error Feedback Fixes SignSGD and other Gradient
Compression Schemes": C(v) = (‖v‖₁ / n) · sign(v). It is biased and needs error
feedback to converge (as 1-bit SGD with carried error, Seide et al. 2014).

Steps, per worker, over its whole flat gradient:
1. scale = ‖v‖₁ / n;
2. send sign(v) as n bits (a zero entry decodes as zero here) and the 4-byte scale.
"""

import math
from dataclasses import dataclass

from scaledrill.sync.compress import Out, Stateless


@dataclass(frozen=True)
class ScaledSign(Stateless):
    def update(self, x, state, rnd):
        n = x.shape[1]
        scale = x.abs().sum(dim=1, keepdim=True) / n  # 1.
        sent = x.sign().mul_(scale)  # scale · sign(v), without a second temporary
        return Out(rnd.mean(sent), sent, math.ceil(n / 8) + 4), state  # 2.
