"""Divergence detectors: small watchers that say why a run has gone wrong.

Protocol: `check(step, scalars) -> reason | None` says whether the step would fire
without changing anything (the engine asks it before the optimizer moves the
weights, so the per-worker rerun gets the weights of a firing step only);
`observe(step, scalars)` is the same verdict that then takes the step into the
detector's history; `state_dict` / `load_state_dict` so a resumed run keeps its
trailing windows. A detector holds
its own counter of firings and never prints; the engine decides what to do
(`telemetry.on_trigger`: stop, or continue after writing an incident record).

- NonFinite: the loss or the gradient norm is NaN or infinite.
- LossSpike: the loss sits more than `threshold` robust standard deviations
  above the median of a trailing window. The spread is the median absolute
  deviation times 1.4826, which equals the standard deviation for Gaussian noise
  (Rousseeuw and Croux 1993, "Alternatives to the Median Absolute Deviation").
  Median and MAD ignore the occasional bad batch that a mean and standard deviation
  would absorb. One-sided: a falling loss never fires. A relative floor joins the
  z-score, in two parts: the loss must also exceed `ratio` times that median, and
  the rise above the median must give back at least `share` of the fall from the
  run's first loss to the median. Near convergence the trailing MAD is tiny and the
  batch losses are heavy-tailed (most batches near 0, a few holding a misfit
  sample), so ordinary noise counts as many sigmas and as many times the median
  (measured: 0.06 against a median of 0.006 on digits, a 10× "spike" that gives
  back 2% of the fall from 2.35); the share ties the alarm to the task's own scale.
- InitialRise: the loss exceeds `factor` times the median of the run's first three
  losses (one lucky first batch of a noisy task is not the start). It needs little
  history, so it watches the first `min_history` steps the window detectors cannot
  (a linear-rule run at full rate from step 0 blows up within a few steps), and it
  stays on after them: a loss three times its starting value is divergence on any task
  (twice was measured to fire on a healthy small-batch teacher run, whose batch losses wander).
- GradExplosion: the gradient norm exceeds `factor` times its trailing median and
  the run's first gradient norm. The second part is the floor for a converged
  run, whose small gradients are heavy-tailed too (measured on digits: 0.71 against
  a median of 0.05, below the first norm 1.24); a gradient past the untrained
  model's own is an explosion on any task.
- OverflowStorm: `count` steps skipped for an overflowed fp16 gradient within
  `window` steps. A few skips while dynamic loss scaling finds its level are
  normal (Micikevicius et al. 2018, "Mixed Precision Training"); a storm means
  the scale cannot settle: the gradients' range no longer fits fp16.
- ScaleCollapse: the loss scale fell below `floor`. Below 1 the scale shrinks the
  gradients instead of lifting them out of fp16's underflow range: what overflows
  is the forward pass or the loss itself, and scaling cannot help.

Tuning: the defaults (z > 6, 2× the median and 20% of the fall, over 50 steps, norm > 10× median,
loss > 3× the first losses' median) are common practice
for catching real blow-ups while staying quiet on ordinary mini-batch noise; lower
them to catch slower drifts at the price of false alarms.
"""

import math
import statistics
from dataclasses import dataclass, field
from typing import Protocol

from scaledrill.telemetry.settings import DETECT_DEFAULTS

MAD_TO_SIGMA = 1.4826  # 1 / Φ⁻¹(3/4): MAD of a Gaussian times this is its σ


class Detector(Protocol):
    fired: int

    def check(self, step: int, scalars: dict[str, float]) -> str | None: ...

    def observe(self, step: int, scalars: dict[str, float]) -> str | None: ...

    def state_dict(self) -> dict: ...

    def load_state_dict(self, state: dict) -> None: ...


@dataclass
class NonFinite:
    keys: tuple[str, ...] = ("loss", "grad_norm")
    fired: int = 0

    def check(self, step: int, scalars: dict[str, float]) -> str | None:
        for key in self.keys:
            value = scalars.get(key)
            if value is not None and not math.isfinite(value):
                return f"{key} is {value} at step {step}"
        return None

    def observe(self, step: int, scalars: dict[str, float]) -> str | None:
        reason = self.check(step, scalars)
        self.fired += reason is not None
        return reason

    def state_dict(self) -> dict:
        return {"fired": self.fired}

    def load_state_dict(self, state: dict) -> None:
        self.fired = state["fired"]


@dataclass
class _Trailing:
    """A trailing window of finite values of one scalar; the base of both window detectors."""

    key: str = "loss"
    window: int = 50
    min_history: int = 20
    history: list[float] = field(default_factory=list)
    fired: int = 0
    first: float | None = None  # the first finite value seen

    def _push(self, value: float) -> None:
        self.history.append(value)
        del self.history[: -self.window]

    def _ready(self, value) -> bool:
        return value is not None and math.isfinite(value) and len(self.history) >= self.min_history

    def observe(self, step: int, scalars: dict[str, float]) -> str | None:
        reason = self.check(step, scalars)
        self.fired += reason is not None
        value = scalars.get(self.key)
        if value is not None and math.isfinite(value):
            self.first = value if self.first is None else self.first
            self._push(value)
        return reason

    def state_dict(self) -> dict:
        return {"history": list(self.history), "fired": self.fired, "first": self.first}

    def load_state_dict(self, state: dict) -> None:
        self.history, self.fired, self.first = list(state["history"]), state["fired"], state.get("first")


@dataclass
class LossSpike(_Trailing):
    threshold: float = 6.0
    ratio: float = 2.0  # the loss must also exceed ratio × the trailing median (1 = no relative floor)
    share: float = 0.2  # ...and rise above it by share × (first loss - median) (0 = no such floor)
    rel_floor: float = 1e-3  # spread floor, × |median|: a flat loss must not turn rounding into a spike

    def check(self, step: int, scalars: dict[str, float]) -> str | None:
        value = scalars.get(self.key)
        if not self._ready(value):
            return None
        med = statistics.median(self.history)
        # The cheap floors first: most steps fail them, and the MAD is a second median.
        fall = (self.first - med) if self.first is not None else 0.0
        if not (value > self.ratio * med and value - med >= self.share * max(fall, 0.0)):
            return None
        mad = statistics.median(abs(h - med) for h in self.history)
        spread = max(MAD_TO_SIGMA * mad, self.rel_floor * abs(med), 1e-12)
        z = (value - med) / spread
        if z <= self.threshold:
            return None
        return (
            f"{self.key} spike at step {step}: {value:.6g} is {z:.1f} robust sigma and "
            f"{value / med:.2f}x above the trailing median {med:.6g} "
            f"(thresholds {self.threshold:g} sigma and {self.ratio:g}x)"
        )


@dataclass
class GradExplosion(_Trailing):
    key: str = "grad_norm"
    factor: float = 10.0

    def check(self, step: int, scalars: dict[str, float]) -> str | None:
        value = scalars.get(self.key)
        if not self._ready(value):
            return None
        med = statistics.median(self.history)
        if med > 0 and value > self.factor * med and value > (self.first or 0.0):  # a zero median (gradients flushed to zero) has no scale
            return (
                f"{self.key} explosion at step {step}: {value:.6g} is {value / med:.1f}x "
                f"the trailing median {med:.6g} (limit {self.factor:g}x) and above the first norm {self.first:.6g}"
            )
        return None


@dataclass
class InitialRise:
    key: str = "loss"
    factor: float = 3.0
    arm: int = 3  # the reference is the median of the first `arm` finite losses: one lucky first batch is not it
    initial: list[float] = field(default_factory=list)
    fired: int = 0
    off: bool = False  # first seen after step 0 (an adopted checkpoint): its losses are not the start of training

    def _watching(self, step: int, value) -> bool:
        """A finite loss of a run that started at step 0. A run taken over mid-training (adopt) starts
        near its converged loss, where noise alone moves a small loss by several times; the windowed
        detectors watch it."""
        started_here = bool(self.initial) or step == 0
        return value is not None and math.isfinite(value) and not self.off and started_here

    def check(self, step: int, scalars: dict[str, float]) -> str | None:
        value = scalars.get(self.key)
        if not self._watching(step, value) or len(self.initial) < self.arm:
            return None  # NonFinite's business, another run's start, or still arming
        start = statistics.median(self.initial)
        if start > 0 and value > self.factor * start:
            return (
                f"{self.key} rise at step {step}: {value:.6g} is {value / start:.2f}x "
                f"the first losses' median {start:.6g} (limit {self.factor:g}x)"
            )
        return None

    def observe(self, step: int, scalars: dict[str, float]) -> str | None:
        value = scalars.get(self.key)
        reason = self.check(step, scalars)
        self.fired += reason is not None
        if self._watching(step, value):
            if len(self.initial) < self.arm:
                self.initial.append(value)
        elif value is not None and math.isfinite(value):
            self.off = True  # its first finite loss came after step 0
        return reason

    def state_dict(self) -> dict:
        return {"initial": list(self.initial), "fired": self.fired, "off": self.off}

    def load_state_dict(self, state: dict) -> None:
        self.initial, self.fired, self.off = list(state["initial"]), state["fired"], bool(state.get("off", False))


@dataclass
class OverflowStorm:
    count: int = 10
    window: int = 50
    recent: list[int] = field(default_factory=list)  # steps skipped within the window
    fired: int = 0

    def _recent(self, step: int) -> list[int]:
        return [s for s in self.recent if s > step - self.window] + [step]

    def check(self, step: int, scalars: dict[str, float]) -> str | None:
        if not scalars.get("skipped"):
            return None
        recent = self._recent(step)
        if len(recent) < self.count:
            return None
        return (
            f"overflow storm at step {step}: {self.count} steps skipped for an inf/NaN gradient since step {recent[0]} "
            f"(limit {self.count} in {self.window} steps); the loss scale is {scalars.get('loss_scale', float('nan')):g}"
        )

    def observe(self, step: int, scalars: dict[str, float]) -> str | None:
        reason = self.check(step, scalars)
        if scalars.get("skipped"):
            self.recent = [] if reason else self._recent(step)  # one firing per storm
        self.fired += reason is not None
        return reason

    def state_dict(self) -> dict:
        return {"recent": list(self.recent), "fired": self.fired}

    def load_state_dict(self, state: dict) -> None:
        self.recent, self.fired = list(state["recent"]), state["fired"]


@dataclass
class ScaleCollapse:
    floor: float = 1.0
    below: bool = False  # fire when the scale crosses the floor, not on every step below it
    fired: int = 0

    def check(self, step: int, scalars: dict[str, float]) -> str | None:
        scale = scalars.get("loss_scale")
        if scale is None or not scale < self.floor or self.below:
            return None
        return f"loss scale collapsed at step {step}: {scale:g} is below the floor {self.floor:g}"

    def observe(self, step: int, scalars: dict[str, float]) -> str | None:
        reason = self.check(step, scalars)
        scale = scalars.get("loss_scale")
        if scale is not None:
            self.below = scale < self.floor
        self.fired += reason is not None
        return reason

    def state_dict(self) -> dict:
        return {"below": self.below, "fired": self.fired}

    def load_state_dict(self, state: dict) -> None:
        self.below, self.fired = bool(state["below"]), state["fired"]


def _detect(cfg_telemetry) -> dict:
    """`telemetry.detect` over its defaults (the node has passed config/rules.py)."""
    given = cfg_telemetry.get("detect") or {}
    return {k: given.get(k, v) for k, v in DETECT_DEFAULTS.items()}


def build_detectors(cfg_telemetry) -> list[Detector]:
    """The detectors that `telemetry.detect` turns on, in a fixed order (cheapest first)."""
    d = _detect(cfg_telemetry)
    out: list[Detector] = []
    if d["nonfinite"]:
        out.append(NonFinite())
    window = {"window": d["spike_window"], "min_history": d["min_history"]}
    if d["spike_z"] is not None:
        out.append(LossSpike(threshold=float(d["spike_z"]), ratio=float(d["spike_ratio"]), share=float(d["spike_share"]), **window))
    if d["grad_factor"] is not None:
        out.append(GradExplosion(factor=float(d["grad_factor"]), **window))
    if d["skip_storm"] is not None:
        out.append(OverflowStorm(count=d["skip_storm"], window=d["skip_window"]))
    if d["scale_floor"] is not None:
        out.append(ScaleCollapse(floor=float(d["scale_floor"])))
    if d["initial_factor"] is not None:
        out.append(InitialRise(factor=float(d["initial_factor"])))
    return out
