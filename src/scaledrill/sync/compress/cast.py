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
        last = []  # the rows of the last mean and their narrow copy (the sums never write into their input)

        def narrow_mean(t, in_place=False):  # a copy is made anyway
            # 1. divide by W first, 2. cast, 3. sum in the narrow type, 4. cast back
            small = (t / W).to(self.dtype)
            last[:] = [t, small]
            return rnd.sum(small).to(t.dtype)

        out, state = self.inner.update(x, state, replace(rnd, mean=narrow_mean))
        # what each worker sent, rounded as it travelled: the rows just cast when the inner sends those (Exact does)
        small = last[1] if last and last[0] is out.sent else (out.sent / W).to(self.dtype)
        sent = small.to(x.dtype) * W
        shrink = self.dtype.itemsize / x.element_size()
        return Out(out.mean, sent, out.wire_bytes * shrink, out.stats), state
