"""Data: the dataset protocol, the layout-invariant sampler and the demo tasks.

A task is three parts, each built by Hydra from a `_target_`:
- `model`: a torch.nn.Module whose forward takes `batch["input"]`;
- `data`: an object with `train` (a Dataset) and optionally `test` (a Dataset)
  and `evaluate(model) -> dict` (for tasks with a closed-form metric);
- `loss`: a `Loss` (below).
"""

from typing import Protocol

import torch


class Dataset(Protocol):
    size: int | None  # None: an endless stream

    def take(self, index: torch.Tensor) -> dict[str, torch.Tensor]:
        """The samples at global indices `index` (int64), as a dict with key "input".

        A pure function of the indices, so every process and every layout sees the
        same sample for the same index.
        """


class Loss(Protocol):
    per_token: bool  # True: normalise by valid tokens, False: by samples

    def __call__(self, output: torch.Tensor, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """SUM (not mean) of the per-unit losses of the batch; the engine normalises."""

    def count(self, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """Units in the batch (samples, or valid tokens)."""

    def metrics(self, output: torch.Tensor, batch: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
        """Sums of evaluation metrics over the batch's units (e.g. correct predictions)."""
