"""The fused path with its all-reduce overlapping backward (docs/design.md, "One optimizer step").

Used where it gives the very bits of the plain fused path followed by the sync:
exact averaging, P > 1 processes, gradients accumulated in the parameters' dtype,
and a step that takes the fused path (a noise-scale step takes vmap and the plain
sync). Then:
1. a hook on every parameter writes each micro-batch's gradient into one flat
   buffer that lives for the whole run (the first micro-batch copies, later ones
   add, as the fused path's concatenation and `_foreach_add_` do);
2. on the last micro-batch the hook also tells the sync's `BucketStarts` that the
   parameter is final, which starts every bucket's all-reduce whose parameters
   all are, while backward goes on with the earlier layers;
3. the engine waits for them (`wait`) just before the sync divides by W.
The buffer is reused every step: a fresh vector of a large model is memory the
kernel backs page by page each time, a visible share of a step.
"""

from functools import partial

import torch

from scaledrill.sync.overlap import BucketStarts
from scaledrill.train.grads import GradComputer, KeptBuffer, StepGrads


class OverlappedFused:
    def __init__(self, grads: GradComputer, starts: BucketStarts, kept: KeptBuffer):
        self.grads, self.starts = grads, starts
        self.flat, self.views = kept.flat, kept.views  # the fused path's buffer, kept for the run
        self.micro: int | None = None  # micro-batch whose backward runs; None outside `compute` (other paths, blame)
        self.last = False
        for i, p in enumerate(grads.params):
            p.register_hook(partial(self._hook, i))

    def _hook(self, i: int, grad: torch.Tensor) -> None:
        """Steps 1 and 2; leaves `grad` as it is."""
        if self.micro is None:
            return
        if self.micro == 0:
            self.views[i].copy_(grad)
        else:
            self.views[i].add_(grad)
        if self.last:
            self.starts.ready(i)

    def compute(self, micro: list[dict], scale: float) -> StepGrads:
        """The fused path's StepGrads, its all-reduce already under way."""
        forward = self.grads._forward_sum(scale)
        params = self.grads.params
        self.starts.arm(self.flat[0])
        total = 0.0
        try:
            for m, batch in enumerate(micro):
                self.micro, self.last = m, m == len(micro) - 1
                value = forward(batch)
                torch.autograd.grad(value, params)  # the hooks keep what it returns
                total += float(value.detach())
        finally:
            self.micro = None
        return StepGrads(self.flat, total)

    def wait(self) -> None:
        """Step 3: the buffer holds the sum over processes."""
        self.starts.wait()
