"""Step functions and models for the check's tests: one correct, the others each with one classic mistake.

Step functions follow the protocol of scaledrill.check.threads:
step(model, loss, micro_batches, reduce) leaves the true batch's gradient in p.grad.
"""

import torch
from torch import nn

from scaledrill.nn.dropout import KeyedDropout, content_keys
from scaledrill.nn.ghost_bn import GhostBatchNorm
from scaledrill.tasks.digits import DigitsNet


def _global_scale(loss, micro_batches, reduce) -> float:
    """W / N with N the global count of units: each micro-loss times this, then reduce = average."""
    local = torch.tensor(sum(float(loss.count(b)) for b in micro_batches), dtype=torch.float64)
    return reduce.workers / float(reduce(local) * reduce.workers)


def good_step(model, loss, micro_batches, reduce):
    """Sum unit losses, divide by the global count, accumulate k micro-steps, reduce once."""
    scale = _global_scale(loss, micro_batches, reduce)
    for batch in micro_batches:
        (loss(model(batch["input"]), batch) * scale).backward()
    for p in model.parameters():
        p.grad = reduce(p.grad)


def mean_of_micro_means_step(model, loss, micro_batches, reduce):
    """Mistake: each micro-batch's loss is its own mean (wrong when token counts vary)."""
    for batch in micro_batches:
        (loss(model(batch["input"]), batch) / loss.count(batch) / len(micro_batches)).backward()
    for p in model.parameters():
        p.grad = reduce(p.grad)


def clip_each_micro_step(model, loss, micro_batches, reduce, max_norm: float = 0.01):
    """Mistake: clips every micro-batch's gradient instead of the averaged one."""
    scale = _global_scale(loss, micro_batches, reduce)
    params = list(model.parameters())
    total = [torch.zeros_like(p) for p in params]
    for batch in micro_batches:
        for p, g in zip(params, torch.autograd.grad(loss(model(batch["input"]), batch) * scale, params)):
            p.grad = g
        torch.nn.utils.clip_grad_norm_(params, max_norm)
        for t, p in zip(total, params):
            t += p.grad
    for p, t in zip(params, total):
        p.grad = reduce(t)


def sync_first_micro_step(model, loss, micro_batches, reduce):
    """Mistake: all-reduces after the first micro-step; the later ones stay local."""
    scale = _global_scale(loss, micro_batches, reduce)
    for m, batch in enumerate(micro_batches):
        (loss(model(batch["input"]), batch) * scale).backward()
        if m == 0:
            for p in model.parameters():
                p.grad = reduce(p.grad)


def per_worker_dropout_step(model, loss, micro_batches, reduce):
    """Mistake: every worker seeds its dropout with its own id, so masks differ from the true batch's."""
    for module in model.modules():
        if isinstance(module, SeededDropout):
            module.generator = torch.Generator().manual_seed(reduce.worker)
    good_step(model, loss, micro_batches, reduce)


class SeededDropout(nn.Module):
    """Inverted dropout drawing from `generator` (the global random stream when None)."""

    def __init__(self, p: float):
        super().__init__()
        self.p, self.generator = p, None

    def forward(self, x):
        if not self.training or self.p == 0:
            return x
        keep = torch.rand(x.shape, generator=self.generator) >= self.p
        return x * keep.to(x.dtype) / (1 - self.p)


class DropoutMLP(nn.Module):
    """The teacher task's MLP with dropout after the first hidden layer (draws from a random stream)."""

    def __init__(self, in_dim: int, hidden: int, out_dim: int, depth: int = 2, p: float = 0.3):
        super().__init__()
        self.first, self.drop = nn.Linear(in_dim, hidden), SeededDropout(p)
        self.rest = nn.Sequential(nn.ReLU(), nn.Linear(hidden, hidden), nn.ReLU(), nn.Linear(hidden, out_dim))

    def forward(self, x):
        return self.rest(self.drop(torch.relu(self.first(x))))


class KeyedDropoutMLP(DropoutMLP):
    """The same MLP with the fix: masks keyed on each sample (its input's bits)."""

    def __init__(self, in_dim: int, hidden: int, out_dim: int, depth: int = 2, p: float = 0.3):
        super().__init__(in_dim, hidden, out_dim, depth, p)
        self.drop = KeyedDropout(p, seed=1)

    def forward(self, x):
        return self.rest(self.drop(torch.relu(self.first(x)), content_keys(x)))


class PerGroupOnlyBatchNorm(GhostBatchNorm):
    """Mistake: a BatchNorm subclass that always normalises its own groups of b, ignoring the global setting."""

    def forward(self, x):
        kept, self.collective = self.collective, None
        try:
            return super().forward(x)
        finally:
            self.collective = kept


class PerGroupOnlyDigitsNet(DigitsNet):
    """The digits CNN with that BatchNorm (fresh BatchNorm parameters are ones and zeros, as before)."""

    def __init__(self, width: int = 8, classes: int = 10, group_size: int | None = None):
        super().__init__(width, classes, group_size)
        for i, module in enumerate(self.features):
            if isinstance(module, GhostBatchNorm):
                self.features[i] = PerGroupOnlyBatchNorm(module.num_features, group_size)
