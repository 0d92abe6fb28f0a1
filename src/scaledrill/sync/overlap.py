"""Exact averaging that overlaps backward: each bucket's all-reduce starts as soon
as backward has written the last of its gradients.

The fused path's flat gradient travels in the same buckets as `bucketed_sum`'s
(buckets.py: same bounds, same in-place SUM), so the sum over processes holds the
same bits; only the moment each call starts changes. Backward finishes the last
parameters first, so buckets start from the last one down, and always in that
order, whatever order the gradients arrive in: every process then issues the same
collectives in the same order, as a backend requires.

Steps of one optimizer step:
1. `arm(flat)`: the buffer backward writes into; every bucket waits for all the
   parameters that overlap it;
2. `ready(i)`, called once per parameter when its gradient in `flat` is final:
   start every bucket, from the last down, whose parameters are all final;
3. `wait()`: start whatever is left (in the same order) and wait for every call;
   `flat` then holds the sum over processes (the caller divides by W once).
"""

import torch

from scaledrill.sync.buckets import bounds


class BucketStarts:
    def __init__(self, collective, spans: list[tuple[int, int]], itemsize: int, bucket_kib: float):
        """`spans`: (offset, numel) of each parameter in the flat vector, in parameter order."""
        self.collective = collective
        n = sum(size for _, size in spans)
        self.pieces = bounds(n, itemsize, bucket_kib)
        # Which buckets each parameter's stretch of the vector overlaps.
        self.touches = [[b for b, piece in enumerate(self.pieces) if offset < piece.stop and piece.start < offset + size]
                        for offset, size in spans]
        self.needs = [sum(b in touched for touched in self.touches) for b in range(len(self.pieces))]
        self.flat: torch.Tensor | None = None

    def arm(self, flat: torch.Tensor) -> None:
        """Step 1."""
        self.flat, self.missing = flat, list(self.needs)
        self.next = len(self.pieces) - 1  # the bucket to start next: the last one first
        self.pending = []

    def ready(self, i: int) -> None:
        """Step 2."""
        for b in self.touches[i]:
            self.missing[b] -= 1
        while self.next >= 0 and self.missing[self.next] == 0:
            self._start()

    def _start(self) -> None:
        self.pending.append(self.collective.all_reduce_start(self.flat[self.pieces[self.next]]))
        self.next -= 1

    def wait(self) -> torch.Tensor:
        """Step 3."""
        while self.next >= 0:
            self._start()
        for work in self.pending:
            work.wait()
        flat, self.flat, self.pending = self.flat, None, []
        return flat
