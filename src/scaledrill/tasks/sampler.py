"""Which samples each simulated worker takes at each step.

The global batch of step s is a slice of one long sequence of sample indices:
the concatenated epoch permutations, each drawn from (seed, epoch) alone. Worker w
takes positions [w·k·b, (w+1)·k·b) of its step's global batch and micro-step m the
b positions from m·b within that. Nothing here depends on P or V, so every layout
of the same W, b, k sees the same samples, and layouts with the same B see the
same global batches.

Epoch tail (the N mod B samples that do not fill a global batch):
- `drop`: skipped; every epoch has floor(N/B) steps, the dropped count is reported;
- `carry`: kept; the next global batch continues into the next epoch's order.
Endless streams (size None) index straight by position.
"""

from dataclasses import dataclass

import torch

from scaledrill.errors import DataError
from scaledrill.layout import Layout

TAILS = ("drop", "carry")  # train.tail (config/rules.py holds the rules on the train keys)


def _perm(size: int, seed: int, epoch: int) -> torch.Tensor:
    gen = torch.Generator().manual_seed(seed * 1_000_003 + epoch)
    return torch.randperm(size, generator=gen)


@dataclass
class Sampler:
    size: int | None
    layout: Layout
    seed: int
    tail: str = "drop"

    def __post_init__(self):
        B = self.layout.global_batch
        if self.size is not None and self.size < B:
            raise DataError(
                f"the training set has {self.size} samples, fewer than one global batch "
                f"B={B} ({self.layout.describe()}); shrink layout.workers, "
                "layout.micro_batch or layout.accum"
            )
        self._cache: dict[int, torch.Tensor] = {}

    @property
    def steps_per_epoch(self) -> float:
        if self.size is None:
            return float("inf")
        B = self.layout.global_batch
        return self.size // B if self.tail == "drop" else self.size / B

    def dropped_samples(self, steps: int) -> int:
        """Samples skipped as the tails of the epochs finished within `steps` steps."""
        if self.size is None or self.tail == "carry":
            return 0
        B = self.layout.global_batch
        return (self.size % B) * (steps // (self.size // B))

    def epoch_of(self, step: int) -> int:
        if self.size is None:
            return 0
        B = self.layout.global_batch
        if self.tail == "drop":
            return step // (self.size // B)
        return (step * B) // self.size

    def _order(self, epoch: int) -> torch.Tensor:
        if epoch not in self._cache:
            if len(self._cache) > 4:
                self._cache.pop(min(self._cache))
            self._cache[epoch] = _perm(self.size, self.seed, epoch)
        return self._cache[epoch]

    def global_batch(self, step: int) -> torch.Tensor:
        """Sample indices of step `step`'s whole global batch, in worker-major order."""
        B = self.layout.global_batch
        if self.size is None:
            return torch.arange(step * B, (step + 1) * B, dtype=torch.long)
        if self.tail == "drop":
            per_epoch = self.size // B
            epoch, within = divmod(step, per_epoch)
            return self._order(epoch)[within * B : (within + 1) * B]
        start = step * B
        parts = []
        while start < (step + 1) * B:
            epoch, offset = divmod(start, self.size)
            take = min(self.size - offset, (step + 1) * B - start)
            parts.append(self._order(epoch)[offset : offset + take])
            start += take
        return torch.cat(parts)

    def worker_batches(self, step: int, workers: range) -> torch.Tensor:
        """Indices for `workers` at `step`, shaped [k, len(workers), b]: micro-step, worker, sample."""
        L = self.layout
        whole = self.global_batch(step).view(L.workers, L.accum, L.micro_batch)
        return whole[workers.start : workers.stop].transpose(0, 1)


ORDERS = ("layout", "torch_distributed")


def make_sampler(size: int | None, layout: Layout, train):
    """The sampler `train.order` names: this module's layout-invariant order (the default), or
    the order of torch's DistributedSampler (torch_order.py), its settings in `train.torch_sampler`."""
    if train.get("order", "layout") == "layout":
        return Sampler(size, layout, train.seed, train.tail)
    from scaledrill.tasks.torch_order import DistributedOrder

    node = train.get("torch_sampler") or {}
    shuffle, seed, drop_last = node.get("shuffle", True), node.get("seed", 0), node.get("drop_last", False)
    return DistributedOrder(size, layout, seed, shuffle=shuffle, drop_last=drop_last)
