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

Global statistics (`set_global_statistics(module, collective)`), as torch's
SyncBatchNorm computes them across ranks: the group is the whole local batch and
its per-channel sums are added over the P processes by a differentiable
all-reduce, so forward and backward equal one BatchNorm (Ioffe & Szegedy 2015)
over all samples of all processes. Two passes keep the variance sound: first
count and Σx give the global mean, then Σ(x - mean)² gives the global variance.
Every process then updates its running statistics with the same global values.
Not for vmap: a collective cannot run inside it.
"""

import torch
from torch import nn


class _AllReduceSum(torch.autograd.Function):
    """Sum over processes whose backward is the same sum: every process's loss
    depends on the global sum, so each input's gradient is the sum of all of them."""

    @staticmethod
    def forward(ctx, tensor: torch.Tensor, collective) -> torch.Tensor:
        ctx.collective = collective
        out = tensor.clone()
        collective.all_reduce(out)
        return out

    @staticmethod
    def backward(ctx, grad: torch.Tensor):
        out = grad.clone()
        ctx.collective.all_reduce(out)
        return out, None


def all_reduce_sum(tensor: torch.Tensor, collective) -> torch.Tensor:
    return _AllReduceSum.apply(tensor, collective)


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
        self.collective = None  # set: global statistics over the processes of this collective

    def extra_repr(self) -> str:
        where = ", global" if self.collective is not None else ""
        return f"{self.num_features}, group_size={self.group_size}, eps={self.eps}, momentum={self.momentum}{where}"

    def _shape(self, x: torch.Tensor) -> list[int]:
        """Broadcast shape of a per-channel vector against one sample: [C, 1, 1, ...]."""
        return [self.num_features] + [1] * (x.dim() - 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.dim() < 2 or x.shape[1] != self.num_features:
            raise ValueError(f"expected [N, {self.num_features}, ...], got {list(x.shape)}")
        if self.training and self.collective is None:
            return self._group_forward(x)
        if self.training:
            y = self._global_forward(x)
        else:
            shape = self._shape(x)
            y = (x - self.running_mean.view(shape)) * torch.rsqrt(self.running_var.view(shape) + self.eps)
        if self.weight is not None:
            shape = self._shape(x)
            y = y * self.weight.view(shape) + self.bias.view(shape)
        return y

    def _group_forward(self, x: torch.Tensor) -> torch.Tensor:
        n = x.shape[0]
        g = n if self.group_size is None else self.group_size
        if g < 1 or n % g:
            raise ValueError(f"batch of {n} samples does not split into groups of group_size={g}")
        groups, C, rest = n // g, self.num_features, x.shape[2:]
        count = g * rest.numel()
        if count < 2:
            raise ValueError(f"each group needs more than one value per channel, got {count}")
        if rest.numel() == 1:
            # [N, C]: composed ops on the [groups, g, C, 1] view beat folding every (group, channel)
            # pair into a channel of torch's batch_norm kernel (4x at [512, 64] in groups of 8, on
            # CPU) and its group_norm kernel (1.2x). Two passes keep the variance sound.
            centred, mean, var = self.group_moments(x)  # step 1
            scale = torch.rsqrt(var + self.eps)  # step 2
            if self.weight is not None:
                y = centred * (scale * self.weight.view(1, 1, C, 1)) + self.bias.view(1, 1, C, 1)
            else:
                y = centred * scale
            with torch.no_grad():  # step 3
                self._update_running(mean.view(groups, C).mean(0), var.view(groups, C).mean(0) * (count / (count - 1)))
            return y.reshape(x.shape)
        # Spatial positions: every (group, channel) pair is one group of torch's group_norm kernel
        # on a [groups, C, g·rest] copy, where its values are contiguous (2-2.5x faster than the
        # composed ops on the digits convolutions, on CPU; scripts/bench, overhead section).
        folded = x.reshape(groups, g, C, -1).transpose(1, 2).reshape(groups, C, -1).contiguous()
        weight, bias = self.weight, self.bias
        if weight is not None and weight.dtype != x.dtype:  # under 16-bit autocast the kernel wants one dtype
            weight, bias = weight.to(x.dtype), bias.to(x.dtype)
        y, mean, invstd = torch.native_group_norm(folded, weight, bias, groups, C, folded.shape[-1], C, self.eps)
        with torch.no_grad():  # step 3, from the kernel's own statistics: var = 1/invstd² - eps
            var = invstd.detach().square().reciprocal() - self.eps
            self._update_running(mean.detach().mean(0), var.mean(0) * (count / (count - 1)))
        return y.reshape(groups, C, g, -1).transpose(1, 2).reshape(x.shape)

    def group_moments(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """Step 1 on the [groups, g, C, rest] view: (x - mean, mean, biased variance), the last two keepdim."""
        g = x.shape[0] if self.group_size is None else self.group_size
        xg = x.reshape(x.shape[0] // g, g, self.num_features, -1)
        mean = xg.mean(dim=(1, 3), keepdim=True)
        centred = xg - mean
        return centred, mean, centred.square().mean(dim=(1, 3), keepdim=True)

    @torch.no_grad()
    def normalized(self, x: torch.Tensor) -> torch.Tensor:
        """x̂ of step 2 before the affine step, shaped like x, by the same kernels as the training forward."""
        n, C = x.shape[0], self.num_features
        g = n if self.group_size is None else self.group_size
        if x[0].numel() == C:
            centred, _, var = self.group_moments(x)
            return (centred * torch.rsqrt(var + self.eps)).reshape(x.shape)
        folded = x.reshape(n // g, g, C, -1).transpose(1, 2).reshape(n // g, C, -1).contiguous()
        normed = torch.native_group_norm(folded, None, None, n // g, C, folded.shape[-1], C, self.eps)[0]
        return normed.reshape(n // g, C, g, -1).transpose(1, 2).reshape(x.shape)

    @torch.no_grad()
    def _update_running(self, mean: torch.Tensor, unbiased_var: torch.Tensor) -> None:
        self.num_batches_tracked.add_(1)
        if self.momentum is None:  # cumulative average, as torch does for momentum=None
            factor = 1.0 / self.num_batches_tracked.to(mean.dtype)
        else:
            factor = self.momentum
        self.running_mean.mul_(1 - factor).add_(factor * mean)
        self.running_var.mul_(1 - factor).add_(factor * unbiased_var)

    def _global_forward(self, x: torch.Tensor) -> torch.Tensor:
        """Normalise with statistics over every sample of every process (see the module doc)."""
        shape = self._shape(x)
        dims = [0] + list(range(2, x.dim()))  # samples and spatial positions
        local_count = torch.full((1,), x.numel() // self.num_features, dtype=x.dtype)
        sums = all_reduce_sum(torch.cat([x.sum(dim=dims), local_count]), self.collective)
        count = sums[-1].detach()
        if count < 2:
            raise ValueError(f"global statistics need more than one value per channel, got {int(count)}")
        mean = sums[:-1] / count
        centred = x - mean.view(shape)
        var = all_reduce_sum(centred.square().sum(dim=dims), self.collective) / count
        self._update_running(mean.detach(), var.detach() * (count / (count - 1)))
        return centred * torch.rsqrt(var + self.eps).view(shape)


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


def set_global_statistics(module: nn.Module, collective) -> int:
    """Make every GhostBatchNorm in `module` normalise over the whole batch of every
    process of `collective` (None: back to groups of `group_size`); returns how many."""
    found = [m for m in module.modules() if isinstance(m, GhostBatchNorm)]
    for m in found:
        m.collective = collective
    return len(found)
