"""Exact averaging: no compression, the reference every other method is measured by."""

from dataclasses import dataclass

from scaledrill.sync.compress import Out, Stateless, dense_bytes


@dataclass(frozen=True)
class Exact(Stateless):
    """Send the gradient as it is. Needs no per-worker rows: a per-process sum is enough.

    With a donated input the average is summed in the caller's own buffer (then `sent`
    is that buffer too, so only a caller that drops `x` may donate it).
    """

    per_worker = False
    lossless = True

    def update(self, x, state, rnd):
        return Out(rnd.mean(x, in_place=rnd.donated), x, dense_bytes(x.shape[1], x.dtype)), state
