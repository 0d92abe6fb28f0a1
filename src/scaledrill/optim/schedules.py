"""Learning-rate schedules: a multiplier of the peak rate as a pure function of the step.

Every schedule is warmup followed by a decay shape; the factor at step s is
`warmup(s) · shape(s)`, and `Recipe.lr_at(s) = peak_lr · factor(s)`. Steps count
from 0.

1. Warmup (Goyal et al. 2017, arXiv 1706.02677): over the first `warmup_steps`
   steps the factor rises linearly from `warmup_start` to 1, so step 0 runs at
   warmup_start·peak and step `warmup_steps` at the peak. Large scaled rates
   diverge in the first steps without it; Goyal et al. used 5 epochs, starting at
   the base rate (warmup_start = base_lr / peak_lr).
2. Shape, with t = (s − warmup_steps) / (total_steps − warmup_steps) in [0, 1]:
   - `constant`    1.
   - `cosine`      f + (1 − f)·½(1 + cos πt)   (Loshchilov & Hutter 2017, without restarts)
   - `polynomial`  f + (1 − f)·(1 − t)^power   (power 1 is a linear decay)
   - `step`        gamma^(number of milestones ≤ s); milestones in steps from 0,
     or as fractions of total_steps (Goyal et al. divide by 10 at epochs 30, 60, 80 of 90,
     from memory).
   f is `final_factor`: the factor reached at total_steps.

total_steps is the schedule's horizon: `schedule.total_steps` when set, else
`train.steps`. They differ when a replay runs a variant longer or shorter than
the original run but keeps its schedule (the horizon stays the original length).
"""

import math
from dataclasses import dataclass

from scaledrill.errors import ConfigError, is_whole

SHAPES = ("constant", "cosine", "polynomial", "step")  # schedule.name; the key rules live in config/rules.py


def warmup(step: int, warmup_steps: int, start: float) -> float:
    """Step 1: linear ramp from `start` at step 0 to 1 at `warmup_steps`."""
    if step >= warmup_steps:
        return 1.0
    return start + (1.0 - start) * step / warmup_steps


def progress(step: int, warmup_steps: int, total_steps: int) -> float:
    """t in [0, 1]: how far step `step` is through the decay phase."""
    span = max(total_steps - warmup_steps, 1)
    return min(max((step - warmup_steps) / span, 0.0), 1.0)


def cosine(t: float, final_factor: float) -> float:
    return final_factor + (1.0 - final_factor) * 0.5 * (1.0 + math.cos(math.pi * t))


def polynomial(t: float, final_factor: float, power: float) -> float:
    return final_factor + (1.0 - final_factor) * (1.0 - t) ** power


def step_decay(step: int, milestones: tuple[int, ...], gamma: float) -> float:
    return gamma ** sum(step >= m for m in milestones)


@dataclass(frozen=True)
class Schedule:
    """A resolved schedule: every count in steps, ready to evaluate."""

    shape: str
    warmup_steps: int
    warmup_start: float
    total_steps: int
    final_factor: float = 0.0
    power: float = 1.0
    milestones: tuple[int, ...] = ()
    gamma: float = 0.1

    def factor(self, step: int) -> float:
        """Multiplier of the peak rate at `step`: step 1 times step 2 of the module docstring."""
        return warmup(step, self.warmup_steps, self.warmup_start) * self.shape_at(step)

    def shape_at(self, step: int) -> float:
        t = progress(step, self.warmup_steps, self.total_steps)
        if self.shape == "cosine":
            return cosine(t, self.final_factor)
        if self.shape == "polynomial":
            return polynomial(t, self.final_factor, self.power)
        if self.shape == "step":
            return step_decay(step, self.milestones, self.gamma)
        return 1.0


def warmup_steps_of(node, steps_per_epoch: float | None) -> int:
    """Warmup length in steps from `warmup_steps` or `warmup_epochs` (rounded to the nearest step)."""
    epochs = node.get("warmup_epochs")
    if epochs is None:
        return int(node.get("warmup_steps") or 0)
    if steps_per_epoch is None:
        raise ConfigError("schedule.warmup_epochs", "an endless stream has no epochs; use schedule.warmup_steps", epochs)
    return round(epochs * steps_per_epoch)


def milestones_of(node, total_steps: int) -> tuple[int, ...]:
    """Milestones as step numbers: whole numbers are steps, numbers in (0, 1) fractions of training."""
    values = list(node.get("milestones") or [])
    if all(is_whole(m) for m in values):
        return tuple(sorted(values))
    return tuple(sorted(round(m * total_steps) for m in values))


def build_schedule(node, total_steps: int, steps_per_epoch: float | None) -> Schedule:
    """The `schedule` config group resolved against the run length."""
    own = {"cosine": ("final_factor",), "polynomial": ("final_factor", "power"), "step": ("gamma",)}  # a shape's own keys
    return Schedule(
        shape=node.name,
        warmup_steps=warmup_steps_of(node, steps_per_epoch),
        warmup_start=float(node.warmup_start),
        total_steps=total_steps,
        milestones=milestones_of(node, total_steps) if node.name == "step" else (),
        **{key: float(node[key]) for key in own.get(node.name, ())},
    )


def horizon_of(node, train_steps: int) -> int:
    """Steps the schedule spans: `schedule.total_steps` if set, else the run length."""
    horizon = node.get("total_steps")
    return train_steps if horizon is None else horizon


def check_warmup(
    warmup_steps: int, total_steps: int, key: str = "schedule.warmup_steps", value=None, length: str = "train.steps"
) -> None:
    """The one statement of "warmup fits in training": config/rules.py applies it to schedule.warmup_steps,
    `resolve_recipe` to warmup in epochs, which only the data's size turns into steps."""
    if warmup_steps > total_steps:
        shown = warmup_steps if value is None else f"{value} = {warmup_steps} steps"
        raise ConfigError(key, f"warmup is longer than training ({length}={total_steps})", shown)
