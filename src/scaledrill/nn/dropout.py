"""Dropout keyed on the sample: the same mask for a sample on every layout.

A mask drawn from a random generator depends on how many draws came before it: on
the process, the worker, the micro-batch order. Accumulation, virtual workers and
real processes then drop other units than the true batch would, and no check can
tell a bug from that noise. Here the mask of a sample is a pure function of
(seed, salt, the sample's key, the unit's position), computed with the counter-based
hash of scaledrill.nn.keyed_random, so it is the same wherever the sample is computed.

Keys: the global sample index is the natural one (a custom step gets it as
micro_batches[m]["index"]); a model that only sees its input can use
`content_keys(inputs)`, a hash of each sample's float32 input bits. Change `salt`
(e.g. to the step number) to draw fresh masks each step.
"""

import torch
from torch import nn

from scaledrill.nn.keyed_random import hashed_uniform, mix, mix_int


def content_keys(inputs: torch.Tensor) -> torch.Tensor:
    """One int64 key per sample (row) from the bits of its values as float32."""
    bits = inputs.detach().to(torch.float32).reshape(inputs.shape[0], -1).view(torch.int32).to(torch.int64)
    column = torch.arange(bits.shape[1], dtype=torch.int64) << 32
    return mix(bits ^ column).sum(dim=1)  # int64 addition wraps: a well-mixed key per row


class KeyedDropout(nn.Module):
    def __init__(self, p: float = 0.5, seed: int = 0):
        super().__init__()
        if not 0.0 <= p < 1.0:
            raise ValueError(f"p must be in [0, 1), got {p}")
        self.p, self.seed, self.salt = p, seed, 0

    def forward(self, x: torch.Tensor, keys: torch.Tensor) -> torch.Tensor:
        if not self.training or self.p == 0:
            return x
        u = hashed_uniform(self.seed * 1_000_003 + self.salt, keys, x[0].numel(), dtype=x.dtype)
        keep = (u >= self.p).to(x.dtype).view(x.shape)
        return x * keep / (1 - self.p)


class SampleDropout(nn.Module):
    """Drop-in for torch.nn.Dropout whose mask is keyed on (seed, layer, step, sample, unit).

    The engine and the check's reference tell every SampleDropout the global indices
    of the samples in the batch and the step (`key_samples`) before each forward, so
    a sample loses the same units on every gradient path and layout, and other units
    at every step (hence every epoch). `batch_dim` is the dimension that indexes the
    samples (1 inside a TransformerEncoderLayer with batch_first=False). Without keys
    (the model used outside scaledrill) it draws from torch's generator as nn.Dropout does.
    """

    def __init__(self, p: float = 0.5, seed: int = 0, layer: int = 0, batch_dim: int = 0):
        super().__init__()
        if not 0.0 <= p < 1.0:
            raise ValueError(f"p must be in [0, 1), got {p}")
        self.p, self.seed, self.layer, self.batch_dim = p, seed, layer, batch_dim
        self.keys: torch.Tensor | None = None
        self.step = 0

    def extra_repr(self) -> str:
        return f"p={self.p}, layer={self.layer}, batch_dim={self.batch_dim}"

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if not self.training or self.p == 0:
            return x
        if self.keys is None:
            return nn.functional.dropout(x, self.p, True)
        moved = x.movedim(self.batch_dim, 0)
        if moved.shape[0] != self.keys.shape[0]:
            raise ValueError(f"dimension {self.batch_dim} of the dropout input {list(x.shape)} should index the "
                             f"{self.keys.shape[0]} samples of the batch")
        seed = mix_int((self.seed & 0xFFFFFFFF) << 32 | (self.layer & 0xFFFFFFFF))
        u = hashed_uniform(seed, self.keys, moved[0].numel(), stream=self.step, dtype=torch.float64)
        keep = (u >= self.p).view(moved.shape).movedim(0, self.batch_dim)
        return x * keep.to(x.dtype) / (1 - self.p)


def sample_dropouts(module: nn.Module) -> list[SampleDropout]:
    """Every SampleDropout of `module`: found once, since a walk over the modules before
    every forward costs microseconds a small model's step notices."""
    return [m for m in module.modules() if isinstance(m, SampleDropout)]


def key_samples(module: nn.Module | list[SampleDropout], keys: torch.Tensor | None, step: int = 0) -> None:
    """Tell every SampleDropout of `module` (or the list `sample_dropouts` found in it) the
    global sample indices of the next forward and the step."""
    for m in sample_dropouts(module) if isinstance(module, nn.Module) else module:
        m.keys, m.step = keys, step
