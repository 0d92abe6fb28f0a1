"""Losses of the demo tasks: each returns a SUM over units, and says how many units.

The engine divides the summed loss by the count summed over the whole global
batch. Summing here and dividing once there is what makes accumulation and data
parallelism equal the true large batch when workers hold different numbers of
units (variable-length sequences): a mean of per-worker means over-weights the
workers with fewer tokens.
"""

import torch
import torch.nn.functional as F


def _count(n: int) -> torch.Tensor:
    return torch.tensor(float(n))


class CrossEntropySum:
    """Classification: output logits [N, K], batch["target"] int64 [N]."""

    per_token = False

    def __call__(self, output, batch):
        return F.cross_entropy(output, batch["target"], reduction="sum")

    def count(self, batch):
        return _count(batch["target"].shape[0])

    def metrics(self, output, batch):
        correct = (output.argmax(-1) == batch["target"]).sum().to(output.dtype)
        return {"loss": self(output, batch), "accuracy": correct}


class SumOfOutputs:
    """The model's forward already returns per-sample losses [N] (noisy quadratic)."""

    per_token = False

    def __call__(self, output, batch):
        return output.sum()

    def count(self, batch):
        return _count(batch["input"].shape[0])

    def metrics(self, output, batch):
        return {"loss": output.sum()}


class MSESum:
    """Regression: Σ over samples of the squared error summed over outputs, times `weight`.

    A small weight (an auxiliary term's coefficient, or a loss normalised by a large
    count) makes every gradient small by the same factor: what fp16 underflows on."""

    per_token = False

    def __init__(self, weight: float = 1.0):
        self.weight = float(weight)

    def __call__(self, output, batch):
        total = (output - batch["target"]).square().sum()
        return total if self.weight == 1.0 else total * self.weight

    def count(self, batch):
        return _count(batch["target"].shape[0])

    def metrics(self, output, batch):
        return {"loss": self(output, batch)}


class TokenCrossEntropySum:
    """Language model: logits [N, T, V], target int64 [N, T], mask bool [N, T] of valid targets."""

    per_token = True

    def _token_losses(self, output, batch):
        ce = F.cross_entropy(output.flatten(0, -2), batch["target"].flatten(), reduction="none")
        return ce.view(batch["target"].shape) * batch["mask"].to(ce.dtype)

    def __call__(self, output, batch):
        return self._token_losses(output, batch).sum()

    def count(self, batch):
        return batch["mask"].sum().to(torch.get_default_dtype())

    def metrics(self, output, batch):
        mask = batch["mask"].to(output.dtype)
        correct = ((output.argmax(-1) == batch["target"]).to(output.dtype) * mask).sum()
        return {"loss": self(output, batch), "accuracy": correct}
