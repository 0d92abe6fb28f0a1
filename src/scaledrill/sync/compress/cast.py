"""Send in a narrower float type (fp16 or bf16), around any compressor.

Like torch's fp16/bf16 compress hooks (`ddp_comm_hooks.default_hooks`): each
worker's values are divided by W *before* the cast, so the sum of W of them
cannot overflow fp16; the sum runs in the narrow type over workers and
processes; the result is cast back. Each worker rounds its own values, as each
rank of a real cluster would, so this wrapper asks for per-worker rows.

Wire bytes scale the inner compressor's count by the narrow item size over the
input's; exact for dense values, an estimate when the inner format carries
indices.
"""

from dataclasses import dataclass, replace

import torch

from scaledrill.sync.compress import Out


@dataclass(frozen=True)
class Cast:
    inner: object
    dtype: torch.dtype

    per_worker = True
    lossless = False

    def init(self, shapes, V, seed, dtype):
        return self.inner.init(shapes, V, seed, dtype)

    def update(self, x, state, rnd):
        W = rnd.world

        def narrow_mean(t, in_place=False):  # a copy is made anyway
            # 1. divide by W first, 2. cast, 3. sum in the narrow type, 4. cast back
            return rnd.sum((t / W).to(self.dtype)).to(t.dtype)

        out, state = self.inner.update(x, state, replace(rnd, mean=narrow_mean))
        sent = (out.sent / W).to(self.dtype).to(x.dtype) * W
        shrink = torch.empty((), dtype=self.dtype).element_size() / x.element_size()
        return Out(out.mean, sent, out.wire_bytes * shrink, out.stats), state
