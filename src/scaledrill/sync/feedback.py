"""Error feedback: carry what compression dropped into the next step.

Stich, Cordonnier, Jaggi 2018, "Sparsified SGD with Memory"; Karimireddy et al.
2019, "Error Feedback Fixes SignSGD and other Gradient Compression Schemes".
Wraps any compressor C; one residual e per global worker.

Steps, per worker w:
1. y = g_w + e_w;
2. transmit c = C(y) (the inner compressor, collectives included);
3. e_w ← y − c.

Invariant, for any C: Σ_t c_t + e_T = Σ_t g_t (up to rounding), so nothing the
workers computed is lost, only delayed.
"""

import math
from dataclasses import dataclass, replace
from typing import Any

import torch

from scaledrill.sync.compress import Out


@dataclass
class FeedbackState:
    worker_residual: torch.Tensor  # [V, n], rows in the order of the process's workers
    inner: Any


@dataclass(frozen=True)
class ErrorFeedback:
    inner: Any

    per_worker = True
    lossless = False

    def init(self, shapes, V, seed, dtype):
        n = sum(math.prod(s) for s in shapes)
        return FeedbackState(torch.zeros(V, n, dtype=dtype), self.inner.init(shapes, V, seed, dtype))

    def update(self, x, state, rnd):
        y = x + state.worker_residual.to(x.dtype)  # 1.
        out, inner = self.inner.update(y, state.inner, replace(rnd, donated=False))  # 2. y is read again in 3.
        shares = out.sent.untyped_storage().data_ptr() == y.untyped_storage().data_ptr()
        residual = y - out.sent if shares else y.sub_(out.sent)  # 3., in y's memory when the inner sent a tensor of its own
        squares = rnd.sum(torch.linalg.vector_norm(residual, dim=1, keepdim=True).double().square())
        stats = {**out.stats, "residual_norm": float(squares.sqrt())}
        return Out(out.mean, out.sent, out.wire_bytes, stats), FeedbackState(residual, inner)
