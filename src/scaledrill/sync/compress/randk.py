"""Random-k sparsification: each worker sends k entries chosen at random.

Stich, Cordonnier, Jaggi 2018, "Sparsified SGD with Memory". With `sync.unbiased`
the kept entries are scaled by n/k, which makes E[C(g)] = g at the price of
n/k times the variance; without it, pair it with error feedback.

Steps, per worker, over its whole flat gradient:
1. k = `sync.count`, or ceil(`sync.fraction` · n);
2. draw k distinct indices from the stream of (seed, step, global worker id);
3. send the k values (scaled by n/k if unbiased). The indices are not sent:
   every receiver can draw them again from the same seed, so only values count
   as wire bytes.
"""

from dataclasses import dataclass

import torch

from scaledrill.sync.compress import Out, Stateless, dense_bytes
from scaledrill.sync.compress.topk import keep_count


@dataclass(frozen=True)
class RandK(Stateless):
    fraction: float = 0.01
    count: int | None = None
    unbiased: bool = True

    def update(self, x, state, rnd):
        n = x.shape[1]
        k = keep_count(n, self.fraction, self.count)
        scale = n / k if self.unbiased else 1.0
        perms = torch.empty(x.shape, dtype=torch.int64)
        for v, gen in enumerate(rnd.generators()):
            torch.randperm(n, generator=gen, out=perms[v])  # 2. the first k of each row's permutation
        idx = perms[:, :k]
        sent = torch.zeros_like(x).scatter_(1, idx, x.gather(1, idx) * scale)  # distinct indices: one scatter for all rows
        return Out(rnd.mean(sent), sent, dense_bytes(k, x.dtype)), state  # 3.
