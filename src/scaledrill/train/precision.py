"""Mixed precision: the forward and loss in 16 bits, master weights in train.dtype.

What a cluster running in bf16 or fp16 does, rehearsed on the CPU (Micikevicius et
al. 2018, "Mixed Precision Training", ICLR):

- `train.precision`: fp32 | bf16 | fp16. The forward pass and the loss run under
  `torch.autocast('cpu', dtype=...)`; parameters, their gradients and the optimizer
  state stay in `train.dtype` (the master copy), as autocast leaves them.
- `train.accum_dtype`: fp32 | bf16 | fp16, the dtype the micro-batch gradients are
  summed in. In 16 bits, contributions smaller than the running sum's last bit are
  lost (swamping; Higham, "Accuracy and Stability of Numerical Algorithms", §4.2,
  from memory): the known pitfall `scaledrill check` names.
- `train.loss_scale`: dynamic | none | a number. fp16's narrow range flushes small
  gradients to zero; the loss is multiplied by a scale S before the backward and
  the gradient divided by S after the all-reduce. A step whose averaged gradient
  holds an inf or NaN is skipped. Dynamic scaling (the same paper, §3.2) multiplies
  S by `train.scaler.shrink` after such a step and by `train.scaler.grow` after
  `train.scaler.patience` clean steps in a row, starting at `train.scaler.start`.

The decision to skip is taken once per step on the all-reduced gradient, which is
the same on every process, so every worker and every layout skips the same steps.
The scale lives in float32 and is multiplied in float32, as torch's own scaler
keeps it, so the two agree step for step (tests/test_precision_scaler.py).
"""

import contextlib
from dataclasses import dataclass

import torch

from scaledrill.errors import is_number

DTYPES16 = {"fp32": None, "bf16": torch.bfloat16, "fp16": torch.float16}  # None: the master dtype


def _f32(value: float) -> float:
    """`value` rounded to float32, where the scale lives."""
    return float(torch.tensor(value, dtype=torch.float32))


@dataclass
class LossScaler:
    """The loss scale S and its history: `scale` for this step, `update(finite)` after it."""

    scale: float = 1.0
    grow: float = 2.0
    shrink: float = 0.5
    patience: int = 2000
    dynamic: bool = False
    streak: int = 0  # clean steps since the scale last changed
    skipped: int = 0  # steps skipped for a non-finite gradient, over the whole run

    def __post_init__(self):
        self.scale = _f32(self.scale)

    @property
    def inverse(self) -> float:
        """1/S rounded to float32, the factor the gradient is unscaled by."""
        return _f32(1.0 / self.scale)

    def update(self, finite: bool) -> None:
        if not finite:
            self.skipped += 1
        if not self.dynamic:
            return
        if not finite:
            self.scale, self.streak = _f32(self.scale * self.shrink), 0
            return
        self.streak += 1
        if self.streak == self.patience:
            grown = _f32(self.scale * self.grow)
            if grown != float("inf"):
                self.scale = grown
            self.streak = 0

    def state_dict(self) -> dict:
        return {"scale": self.scale, "streak": self.streak, "skipped": self.skipped}

    def load_state_dict(self, state: dict) -> None:
        self.scale, self.streak, self.skipped = float(state["scale"]), int(state["streak"]), int(state["skipped"])


@dataclass
class Verdict:
    """What the precision layer decided about one step's averaged gradient."""

    apply: bool  # False: skip the optimizer step
    scalars: dict  # loss_scale, skipped, underflow_share, overflow_share
    layers: dict | None  # per-layer underflow/overflow shares, on layer steps


def value_shares(flat: torch.Tensor) -> tuple[float, float]:
    """(share of values exactly zero, share not finite) of `flat`.

    A zero is a gradient value that underflowed, or one that is zero by structure
    (a dead unit, a constant input pixel): compare the share with an fp32 run."""
    n = max(flat.numel(), 1)
    return float((flat == 0).sum()) / n, float((~torch.isfinite(flat)).sum()) / n


class Precision:
    """The run's precision settings and its loss scaler; the engine's hooks."""

    def __init__(self, train):  # `train` has passed config/rules.py
        self.name = train.precision
        self.accum_name = train.accum_dtype
        self.autocast_dtype = DTYPES16[self.name]
        self.accum_dtype = DTYPES16[self.accum_name]
        mode = train.loss_scale
        # Dynamic scaling is the default of fp16 only: bf16 has float32's range.
        self.scaling = self.name == "fp16" and mode != "none" or is_number(mode)
        s = train.scaler
        start = float(mode) if is_number(mode) else s.start
        dynamic = self.name == "fp16" and mode == "dynamic"
        self.scaler = LossScaler(start if self.scaling else 1.0, s.grow, s.shrink, s.patience, dynamic)
        self.watch = self.name != "fp32" or self.accum_name != "fp32"  # telemetry only where it can say something

    def autocast(self):
        if self.autocast_dtype is None:
            return contextlib.nullcontext()
        return torch.autocast("cpu", dtype=self.autocast_dtype)

    @property
    def loss_scale(self) -> float:
        return self.scaler.scale

    def widen(self, local: torch.Tensor, dtype: torch.dtype) -> torch.Tensor:
        """The accumulated gradient in the master dtype, for the sync."""
        return local if local.dtype == dtype else local.to(dtype)

    def after_reduce(self, average: torch.Tensor, views: list[torch.Tensor] | None, names: list[str]) -> Verdict:
        """Unscale the averaged gradient in place, decide whether the step applies, update the scale.

        `views`: per-parameter views of `average`, on steps that record per-layer statistics."""
        scale = self.scaler.scale
        if not (self.scaling or self.watch):
            return Verdict(True, {}, None)
        zeros, overflow = value_shares(average)
        finite = overflow == 0.0
        if self.scaling and scale != 1.0:
            average.mul_(self.scaler.inverse)
        if self.scaling:
            self.scaler.update(finite)
        scalars = {"loss_scale": scale, "skipped": float(self.scaling and not finite), "underflow_share": zeros, "overflow_share": overflow}
        layers = None
        if views is not None:
            layers = {}
            for name, view in zip(names, views):
                z, o = value_shares(view)
                layers[name] = {"underflow_share": z, "overflow_share": o}
        return Verdict(finite or not self.scaling, scalars, layers)

    def state_dict(self) -> dict:
        return {"scaling": self.scaling, "scaler": self.scaler.state_dict()}

    def load_state_dict(self, state: dict) -> None:
        """Continue the checkpoint's scale, unless it was made without loss scaling (a replay
        that turns scaling on starts from train.scaler.start; the skip count carries on)."""
        if state["scaling"] == self.scaling:
            self.scaler.load_state_dict(state["scaler"])
        else:
            self.scaler.skipped = int(state["scaler"]["skipped"])

    def summary(self) -> dict:
        return {
            "precision": self.name,
            "accum_dtype": self.accum_name,
            "skipped_steps": self.scaler.skipped,
            "final_loss_scale": self.scaler.scale if self.scaling else None,
        }
