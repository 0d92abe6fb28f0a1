"""What the engine hands telemetry each step, and what telemetry does with it.

The monitor runs in every process, on numbers that are identical in every process
(global loss, global norms), so all processes agree on when a detector fires and
stop together. Only rank 0 writes the run store and incident records.
"""

import math
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

from scaledrill.errors import ConfigError
from scaledrill.telemetry.detectors import build_detectors
from scaledrill.telemetry.incident import write_incident
from scaledrill.telemetry.noise_scale import NoiseScale
from scaledrill.telemetry.store import RunStore


@dataclass
class StepRecord:
    """One optimizer step as telemetry sees it."""

    step: int
    loss: float
    lr: float
    grad_norm: float  # pre-clip norm of the averaged gradient
    clipped_norm: float  # the norm actually applied
    small_sq: float | None = None  # mean over workers of |g_w|², when per-worker gradients were at hand
    big_sq: float | None = None  # |exact average|² on the same step
    layers: dict | None = None  # per-layer stats, every telemetry.layer_every steps
    trust: dict | None = None  # per-layer trust ratios (LARS, LAMB)
    sync: dict = field(default_factory=dict)
    interrupt: bool = False  # some process was asked to stop (SIGINT/SIGTERM)
    signum: int = 0  # which signal, for the exit status (128 + it)
    precision: dict = field(default_factory=dict)  # loss_scale, skipped, underflow/overflow shares (train/precision.py)
    skipped: bool = False  # the step's scaled gradient overflowed; no update was applied

    def scalars(self) -> dict[str, float]:
        out = {"loss": self.loss, "lr": self.lr}
        if not self.skipped:  # a skipped step has no gradient norm: the overflow is reported, not a divergence
            out.update(grad_norm=self.grad_norm, grad_norm_clipped=self.clipped_norm)
        out.update(self.precision)
        for key in ("cosine_to_exact", "rel_error_to_exact", "residual_norm", "wire_bytes_per_worker", "compression_ratio"):
            if key in self.sync:
                out[key] = float(self.sync[key])
        return out


def open_event_writer(folder: Path):
    """TensorBoard's writer (torch.utils.tensorboard), from the optional `tensorboard` extra."""
    try:
        from torch.utils.tensorboard import SummaryWriter
    except ImportError:
        raise ConfigError(
            "telemetry.tensorboard", "needs the tensorboard package: pip install 'scaledrill[tensorboard]'", True
        ) from None
    return SummaryWriter(log_dir=str(folder))


class Monitor:
    def __init__(self, cfg, run_dir: Path | None, rank: int, b_small: int, b_big: int, config_yaml: str):
        tel = cfg.telemetry
        self.cfg = tel
        self.run_dir = run_dir
        self.b_small, self.b_big = b_small, b_big
        self.noise = NoiseScale(decay=tel.noise_decay)
        self.detectors = build_detectors(tel)
        self.stop_on_trigger = tel.on_trigger == "stop"
        keep = tel.incident.steps
        self.layer_history: deque = deque(maxlen=max(keep, 50))
        self.scalar_history: deque = deque(maxlen=max(keep, 50))
        self.config_yaml = config_yaml
        self.last_checkpoint: str | None = None
        self.incidents: list[str] = []
        self.last_incident: int | None = None  # step of the newest incident record
        self.blame = None  # set by the engine: () -> each worker's loss and gradient norm at the step (collective)
        self.store = None
        self.events = None  # TensorBoard event files, when telemetry.tensorboard is on
        if rank == 0 and run_dir is not None:
            self.store = RunStore(run_dir / "run.sqlite", flush_every=tel.flush_every)
            self.store.start("run", config_yaml)
            if tel.tensorboard:
                self.events = open_event_writer(run_dir / "tensorboard")

    def would_fire(self, record: StepRecord) -> bool:
        """Whether `observe(record)` will find a detector firing, asked before the step's update
        (the engine then keeps the weights the per-worker rerun needs); changes nothing."""
        scalars = record.scalars()
        return any(d.check(record.step, scalars) for d in self.detectors)

    def observe(self, record: StepRecord) -> str | None:
        """Log the step; return a detector's reason when one fires and the run should stop."""
        scalars = record.scalars()
        if record.small_sq is not None and record.big_sq is not None and self.b_big > self.b_small:
            self.noise.update(record.small_sq, self.b_small, record.big_sq, self.b_big)
        scalars.update(self.noise.scalars())
        layers = dict(record.layers or {})
        for name, ratio in (record.trust or {}).items():
            layers.setdefault(name, {})["trust_ratio"] = float(ratio)
        self.scalar_history.append((record.step, scalars))
        if layers:
            self.layer_history.append((record.step, layers))
        if self.store is not None:
            self.store.log_scalars(record.step, scalars)
            if layers:
                self.store.log_layers(record.step, layers)
        if self.events is not None:
            for name, value in scalars.items():
                self.events.add_scalar(name, value, record.step)
        reasons = [r for r in (d.observe(record.step, scalars) for d in self.detectors) if r]
        if not reasons:
            return None
        reason = "; ".join(reasons)
        # A run told to continue may fire every step: one incident record (and one per-worker rerun) per
        # `incident.steps` steps, each holding that many steps of history; every firing is still an event.
        due = self.last_incident is None or record.step - self.last_incident >= self.cfg.incident.steps
        if due:
            self.last_incident = record.step
        workers = self.blame() if self.blame is not None and due else None  # every process takes part
        if self.store is not None:
            incident = self._incident(record.step, reason, workers) if due else self.incidents[-1]
            self.store.log_event(record.step, "detector", {"reason": reason, "incident": incident})
        return reason if self.stop_on_trigger else None

    def _incident(self, step: int, reason: str, workers: dict | None = None) -> str:
        incident = self.cfg.incident
        path = write_incident(
            self.run_dir, step, reason, list(self.layer_history), list(self.scalar_history), self.config_yaml,
            self.last_checkpoint, keep=incident.steps, factor=incident.factor, workers=workers,
        )
        self.incidents.append(str(path))
        return str(path)

    def summary(self) -> dict:
        b = self.noise.b_simple
        return {"noise_scale": None if b is None or not math.isfinite(b) else b, "incidents": self.incidents}

    def state_dict(self) -> dict:
        return {"noise": self.noise.state_dict(), "detectors": [d.state_dict() for d in self.detectors]}

    def load_state_dict(self, state: dict) -> None:
        self.noise.load_state_dict(state["noise"])
        for detector, saved in zip(self.detectors, state["detectors"]):
            detector.load_state_dict(saved)

    def flush(self) -> None:
        """Commit the buffered rows now (at a checkpoint: the store then covers every step it holds)."""
        if self.store is not None:
            self.store.flush()

    def close(self, status: str) -> None:
        if self.events is not None:
            self.events.close()
            self.events = None
        if self.store is not None:
            self.store.close(status)
            self.store = None
