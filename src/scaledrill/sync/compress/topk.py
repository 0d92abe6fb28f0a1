"""Top-k sparsification: each worker sends its k largest-magnitude entries.

Stich, Cordonnier, Jaggi 2018, "Sparsified SGD with Memory"; Lin et al. 2018,
"Deep Gradient Compression". Biased: use it with error feedback
(`sync.error_feedback: true`), which carries the dropped mass to later steps.

Steps, per worker, over its whole flat gradient (not per bucket or layer):
1. k = `sync.count`, or ceil(`sync.fraction` · n);
2. keep the k entries of largest |g|, zero the rest;
3. send k values and k 4-byte indices.

Tuning: 0.1 %–1 % with error feedback is the usual range (common practice).
"""

import math
from dataclasses import dataclass

import torch

from scaledrill.sync.compress import Out, Stateless, dense_bytes


def keep_count(n: int, fraction: float, count: int | None) -> int:
    k = count if count is not None else math.ceil(fraction * n)
    return max(1, min(n, k))


@dataclass(frozen=True)
class TopK(Stateless):
    fraction: float = 0.01
    count: int | None = None

    def update(self, x, state, rnd):
        n = x.shape[1]
        k = keep_count(n, self.fraction, self.count)
        idx = x.abs().topk(k, dim=1, sorted=False).indices  # 2.
        sent = torch.zeros_like(x).scatter_(1, idx, x.gather(1, idx))
        return Out(rnd.mean(sent), sent, k * (dense_bytes(1, x.dtype) + 4)), state  # 3.
