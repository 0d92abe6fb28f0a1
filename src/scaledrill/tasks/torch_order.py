"""Data order of a plain PyTorch data-parallel job: `train.order=torch_distributed`.

Why: to replay a run made on a cluster by an ordinary DDP script, each simulated
worker must see the very samples its rank saw there. Such a script gives rank w of
W a `torch.utils.data.DistributedSampler(num_replicas=W, rank=w, shuffle, seed,
drop_last)`, calls `set_epoch(e)` before epoch e, and batches the sampler's indices
with a `DataLoader(batch_size=b)`; with accumulation, k consecutive batches make one
optimizer step.

The sampler's rule (torch/utils/data/distributed.py, torch 2.x):
1. the epoch's order is `torch.randperm(N, generator seeded with seed + epoch)`,
   or 0..N-1 without shuffling;
2. drop_last=False pads it to a multiple of W by repeating its own head;
   drop_last=True cuts it to the largest multiple of W;
3. rank w takes every W-th index from position w.

Worker w (global id = rank) then takes consecutive runs of b of its indices as
micro-batches and k of those per step. Each epoch has floor(floor(n/b)/k) steps for
the n indices of a rank: the DataLoader's incomplete last batch (n mod b samples,
which a loader with drop_last=False would still yield) and batches that do not fill
an accumulation group are not used, so pick sizes that divide, or expect the
replay to part from the cluster log at the end of each epoch.
Like the layout order, nothing here depends on P or V.
"""

import math

import torch

from scaledrill.errors import ConfigError, DataError
from scaledrill.layout import Layout


class DistributedOrder:
    """The Sampler protocol (tasks/sampler.py) in the order of torch's DistributedSampler."""

    def __init__(self, size: int | None, layout: Layout, seed: int, shuffle: bool = True, drop_last: bool = False):
        if size is None:
            raise ConfigError("train.order", "torch_distributed needs a dataset of known size (task.data.train.size), not an endless stream", "torch_distributed")
        W, b, k = layout.workers, layout.micro_batch, layout.accum
        self.size, self.layout, self.seed, self.shuffle, self.drop_last = size, layout, seed, shuffle, drop_last
        if drop_last and size % W:
            self.per_rank = math.ceil((size - W) / W)
        else:
            self.per_rank = math.ceil(size / W)
        self.per_epoch = (self.per_rank // b) // k
        if self.per_epoch == 0:
            raise DataError(
                f"the training set has {size} samples: {self.per_rank} per worker under train.order=torch_distributed, "
                f"fewer than one step's {k * b} (layout.micro_batch={b} x layout.accum={k}); shrink layout.workers, "
                "layout.micro_batch or layout.accum"
            )
        self._cache: dict[int, torch.Tensor] = {}

    @property
    def steps_per_epoch(self) -> float:
        return float(self.per_epoch)

    def dropped_samples(self, steps: int) -> int:
        """Sampler positions of the finished epochs that no step used (padding included)."""
        L = self.layout
        unused = L.workers * (self.per_rank - self.per_epoch * L.accum * L.micro_batch)
        return unused * (steps // self.per_epoch)

    def epoch_of(self, step: int) -> int:
        return step // self.per_epoch

    def rank_indices(self, epoch: int) -> torch.Tensor:
        """[W, n]: row w is what rank w's DistributedSampler yields in `epoch` (steps 1-3)."""
        if epoch not in self._cache:
            if len(self._cache) > 4:
                self._cache.pop(min(self._cache))
            if self.shuffle:
                order = torch.randperm(self.size, generator=torch.Generator().manual_seed(self.seed + epoch))
            else:
                order = torch.arange(self.size)
            total = self.per_rank * self.layout.workers
            if total > self.size:
                order = order.repeat(math.ceil(total / self.size))
            self._cache[epoch] = order[:total].view(self.per_rank, self.layout.workers).t().contiguous()
        return self._cache[epoch]

    def worker_batches(self, step: int, workers: range) -> torch.Tensor:
        """Indices for `workers` at `step`, shaped [k, len(workers), b]: micro-step, worker, sample."""
        L = self.layout
        epoch, within = divmod(step, self.per_epoch)
        start = within * L.accum * L.micro_batch
        rows = self.rank_indices(epoch)[workers.start : workers.stop, start : start + L.accum * L.micro_batch]
        return rows.reshape(len(workers), L.accum, L.micro_batch).transpose(0, 1)

    def global_batch(self, step: int) -> torch.Tensor:
        """Sample indices of the whole global batch, in worker-major order (as the layout order)."""
        return self.worker_batches(step, range(self.layout.workers)).transpose(0, 1).reshape(-1)
