"""Checks and casts applied to every batch the engine takes."""

import math

import torch

from scaledrill.errors import DataError


def cast_batch(batch: dict, dtype: torch.dtype) -> dict:
    """The batch with its floating tensors in `dtype`: the batch itself when they already are
    (every step of a float32 run; a new dict and a call per tensor are a visible share of a 1 ms step)."""
    if all(v.dtype == dtype or not v.is_floating_point() for v in batch.values()):
        return batch
    return {k: v.to(dtype) if v.is_floating_point() else v for k, v in batch.items()}


def check_finite(batch: dict, index: torch.Tensor) -> None:
    """Name the first sample whose input holds NaN or Inf (a clear error, not a NaN loss later).

    A finite sum proves every value finite (NaN and Inf propagate through it), so
    the per-sample search runs only when the sum is not finite (a bad value, or an
    overflow of a sum of finite values, which the search then clears).
    """
    for key, value in batch.items():
        if value.is_floating_point() and not math.isfinite(float(value.sum())):
            bad = ~torch.isfinite(value.reshape(value.shape[0], -1)).all(dim=1)
            if bad.any():
                sample = int(index.reshape(-1)[bad.nonzero()[0, 0]])
                raise DataError(f"training sample {sample} has a NaN or Inf in its {key!r} tensor")
