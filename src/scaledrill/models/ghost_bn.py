"""Ghost batch normalization: BatchNorm whose statistics come from groups of samples.

Hoffer, Hubara, Soudry 2017, "Train longer, generalize better". On a cluster every
worker normalises its own micro-batch, so a fused forward over the V·b samples of
V simulated workers must normalise each consecutive group of b samples on its own,
not the whole V·b. Set `group_size` to the per-worker batch b; None normalises the
whole batch like torch's BatchNorm.

Training, per group of `group_size` samples along dim 0:
1. mean and biased variance over the group's samples and spatial positions;
2. normalise with them, then scale by `weight` and shift by `bias`;
3. update the running statistics (torch's convention, momentum 0.1) with the MEAN
   over groups of the group means and unbiased group variances.

Running statistics follow the mean over workers of each worker's batch
statistics. Since the update is linear, this equals the mean of the running
statistics of separate per-worker BatchNorm modules started from the same state.
Step 3 is an in-place update of the buffers under no_grad written with primitive
ops, so under `torch.func.vmap` with buffers batched over workers each worker
updates its own copy. Eval mode normalises with the running statistics.
"""

import torch
from torch import nn


class GhostBatchNorm(nn.Module):
    def __init__(self, num_features: int, group_size: int | None = None, eps: float = 1e-5,
                 momentum: float | None = 0.1, affine: bool = True):
        super().__init__()
        self.num_features, self.group_size, self.eps, self.momentum = num_features, group_size, eps, momentum
        self.weight = nn.Parameter(torch.ones(num_features)) if affine else None
        self.bias = nn.Parameter(torch.zeros(num_features)) if affine else None
        self.register_buffer("running_mean", torch.zeros(num_features))
        self.register_buffer("running_var", torch.ones(num_features))
        self.register_buffer("num_batches_tracked", torch.tensor(0, dtype=torch.long))

    def extra_repr(self) -> str:
        return f"{self.num_features}, group_size={self.group_size}, eps={self.eps}, momentum={self.momentum}"

    def _shape(self, x: torch.Tensor) -> list[int]:
        """Broadcast shape of a per-channel vector against one sample: [C, 1, 1, ...]."""
        return [self.num_features] + [1] * (x.dim() - 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.dim() < 2 or x.shape[1] != self.num_features:
            raise ValueError(f"expected [N, {self.num_features}, ...], got {list(x.shape)}")
        if self.training:
            y = self._train_forward(x)
        else:
            shape = self._shape(x)
            y = (x - self.running_mean.view(shape)) * torch.rsqrt(self.running_var.view(shape) + self.eps)
        if self.weight is not None:
            shape = self._shape(x)
            y = y * self.weight.view(shape) + self.bias.view(shape)
        return y

    def _train_forward(self, x: torch.Tensor) -> torch.Tensor:
        n = x.shape[0]
        g = n if self.group_size is None else self.group_size
        if g < 1 or n % g:
            raise ValueError(f"batch of {n} samples does not split into groups of group_size={g}")
        grouped = x.reshape(n // g, g, *x.shape[1:])  # [G, g, C, ...]
        dims = [1] + list(range(3, grouped.dim()))  # samples and spatial positions
        mean = grouped.mean(dim=dims, keepdim=True)  # step 1
        var = (grouped - mean).square().mean(dim=dims, keepdim=True)
        y = ((grouped - mean) * torch.rsqrt(var + self.eps)).reshape(x.shape)  # step 2
        count = grouped.numel() // (grouped.shape[0] * self.num_features)
        if count < 2:
            raise ValueError(f"each group needs more than one value per channel, got {count}")
        with torch.no_grad():  # step 3
            group_mean = mean.detach().reshape(n // g, self.num_features).mean(0)
            group_var = var.detach().reshape(n // g, self.num_features).mean(0) * (count / (count - 1))
            self.num_batches_tracked.add_(1)
            if self.momentum is None:  # cumulative average, as torch does for momentum=None
                factor = 1.0 / self.num_batches_tracked.to(group_mean.dtype)
            else:
                factor = self.momentum
            self.running_mean.mul_(1 - factor).add_(factor * group_mean)
            self.running_var.mul_(1 - factor).add_(factor * group_var)
        return y


def convert_batchnorm(module: nn.Module, group_size: int | None = None) -> nn.Module:
    """Replace every nn.BatchNorm1d/2d in `module` by a GhostBatchNorm with the same state."""
    if isinstance(module, (nn.BatchNorm1d, nn.BatchNorm2d)):
        if not module.track_running_stats:
            raise ValueError("GhostBatchNorm keeps running statistics; the BatchNorm has track_running_stats=False")
        ghost = GhostBatchNorm(module.num_features, group_size, module.eps, module.momentum, module.affine)
        ghost.to(module.running_mean)  # device and floating dtype of the original
        ghost.load_state_dict(module.state_dict())
        return ghost.train(module.training)
    for name, child in module.named_children():
        setattr(module, name, convert_batchnorm(child, group_size))
    return module


def set_group_size(module: nn.Module, group_size: int | None) -> int:
    """Set `group_size` on every GhostBatchNorm in `module`; returns how many were set."""
    found = [m for m in module.modules() if isinstance(m, GhostBatchNorm)]
    for m in found:
        m.group_size = group_size
    return len(found)
