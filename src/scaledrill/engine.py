"""The training loop: one optimizer step of DESIGN.md, repeated.

    for each of k micro-batches: per-worker gradients   (grads.py)
    sync: compress per worker -> reduce in-process -> all-reduce -> ÷ W   (sync/)
    clip by global norm once, after averaging
    optimizer update (per-layer trust ratio for LARS/LAMB)
    telemetry

The engine knows nothing of any one compressor, optimizer or detector: it calls
their protocols. Every process runs this same loop on its own workers.
"""

import math
import time
from dataclasses import dataclass, field

import torch
from omegaconf import OmegaConf

from .backends import Collective
from .data.sampler import Sampler
from .data.tasks import Task, build_task
from .errors import ConfigError, DataError
from .grads import GradComputer, flatten_params, write_grads
from .layout import Layout
from .models.ghost_bn import set_group_size
from .optim import build_optimizer, clip_by_global_norm, resolve_recipe, set_lr
from .sync import build_sync

DTYPES = {"float32": torch.float32, "float64": torch.float64}


@dataclass
class StepRecord:
    """What one step leaves behind for telemetry and the summary."""

    step: int
    loss: float
    lr: float
    grad_norm: float  # pre-clip norm of the averaged gradient
    sync: dict = field(default_factory=dict)


def _cast_batch(batch: dict, dtype: torch.dtype) -> dict:
    return {k: v.to(dtype) if v.is_floating_point() else v for k, v in batch.items()}


def check_finite(batch: dict, index: torch.Tensor) -> None:
    """Name the first sample whose input holds NaN or Inf (a clear error, not a NaN loss later)."""
    for key, value in batch.items():
        if value.is_floating_point():
            bad = ~torch.isfinite(value.reshape(value.shape[0], -1)).all(dim=1)
            if bad.any():
                sample = int(index.reshape(-1)[bad.nonzero()[0, 0]])
                raise DataError(f"training sample {sample} has a NaN or Inf in its {key!r} tensor")


class Trainer:
    """State of one process's training run; `step()` advances one optimizer step."""

    def __init__(self, cfg, collective: Collective):
        self.cfg, self.comm = cfg, collective
        self.layout = Layout.from_config(cfg.layout)
        self.workers = self.layout.worker_ids(collective.rank)
        if cfg.train.dtype not in DTYPES:
            raise ConfigError("train.dtype", f"must be one of {', '.join(DTYPES)}", cfg.train.dtype)
        self.dtype = DTYPES[cfg.train.dtype]

        torch.manual_seed(cfg.train.seed)  # same initial parameters in every process
        self.task: Task = build_task(cfg.task)
        self.model = self.task.model.to(self.dtype)
        set_group_size(self.model, self.layout.micro_batch)
        self.model.train()

        self.sampler = Sampler(self.task.data.train.size, self.layout, cfg.train.seed, cfg.train.tail)
        self.recipe = resolve_recipe(cfg, self.layout, self.task.data.train.size, cfg.train.tail)
        self.optimizer = build_optimizer(list(self.model.named_parameters()), cfg.optim)
        self.params = [p for p in self.model.parameters()]
        self.sync = build_sync(cfg.sync, self.layout, [p.shape for p in self.params], collective, cfg.train.seed)
        self.grads = GradComputer(self.model, self.task.loss, self.layout.per_proc)
        self.path = self._choose_path(cfg.train.grads)
        self.step_index = 0

    def _choose_path(self, asked: str) -> str:
        if asked not in ("auto", "fused", "vmap", "loop"):
            raise ConfigError("train.grads", "must be one of auto, fused, vmap, loop", asked)
        if asked == "fused" and self.sync.per_worker:
            raise ConfigError("train.grads", f"fused cannot serve sync={self.cfg.sync.name}, which needs each worker's gradient; use auto, vmap or loop")
        if asked != "auto":
            return asked
        return "vmap" if self.sync.per_worker else "fused"

    # -- one step ------------------------------------------------------------
    def _micro_batches(self, step: int) -> list[dict]:
        index = self.sampler.worker_batches(step, self.workers)  # [k, V, b]
        micro = []
        for m in range(self.layout.accum):
            batch = self.task.data.train.take(index[m].reshape(-1))
            check_finite(batch, index[m])
            micro.append(_cast_batch(batch, self.dtype))
        return micro

    def _global_count(self, micro: list[dict]) -> float:
        """Units the step's loss is normalised by: samples, or valid tokens over all workers."""
        if not getattr(self.task.loss, "per_token", False):
            return float(self.layout.global_batch)
        local = torch.stack([torch.as_tensor(self.task.loss.count(b), dtype=torch.float64) for b in micro]).sum()
        self.comm.all_reduce(local)
        return float(local)

    def _average_buffers(self) -> None:
        """Running statistics follow the mean over all W workers (the mean over processes of process means)."""
        if self.comm.size == 1:
            return
        for name in self.grads.buffer_names:
            buf = dict(self.model.named_buffers())[name]
            self.comm.all_reduce(buf)
            buf /= self.comm.size

    def step(self, path: str | None = None) -> StepRecord:
        step = self.step_index
        micro = self._micro_batches(step)
        count = self._global_count(micro)
        scale = self.layout.workers / count
        result = self.grads.compute(micro, scale, path or self.path)
        average = self.sync.reduce(result.local, self.workers, step)
        self._average_buffers()

        loss = torch.tensor([result.loss_sum], dtype=torch.float64)
        self.comm.all_reduce(loss)
        write_grads(average, self.params)
        grad_norm = clip_by_global_norm(self.params, self.cfg.optim.clip_norm)
        lr = self.recipe.lr_at(step)
        set_lr(self.optimizer, lr)
        self.optimizer.step()
        self.step_index += 1
        return StepRecord(step, float(loss) / self.layout.workers, lr, float(grad_norm), dict(self.sync.stats))

    # -- evaluation ----------------------------------------------------------
    @torch.no_grad()
    def evaluate(self, chunk: int = 1024) -> dict[str, float]:
        data, loss = self.task.data, self.task.loss
        self.model.eval()
        try:
            if hasattr(data, "evaluate"):
                return {k: float(v) for k, v in data.evaluate(self.model).items()}
            test = getattr(data, "test", None)
            if test is None:
                return {}
            sums: dict[str, float] = {}
            units = 0.0
            for start in range(0, test.size, chunk):
                index = torch.arange(start, min(start + chunk, test.size))
                batch = _cast_batch(test.take(index), self.dtype)
                out = self.model(batch["input"])
                units += float(loss.count(batch))
                for k, v in loss.metrics(out, batch).items():
                    sums[k] = sums.get(k, 0.0) + float(v)
            return {k: v / units for k, v in sums.items()}
        finally:
            self.model.train()

    def params_l2(self) -> float:
        return float(flatten_params(self.params).double().norm())


def run_training(cfg, collective: Collective, on_step=None) -> dict:
    """Train for cfg.train.steps steps; returns the summary (meaningful on rank 0)."""
    started = time.perf_counter()
    trainer = Trainer(cfg, collective)
    steps, every = cfg.train.steps, cfg.train.eval_every
    records: list[StepRecord] = []
    evals: dict[int, dict] = {}
    for _ in range(trainer.step_index, steps):
        record = trainer.step()
        records.append(record)
        last = trainer.step_index == steps
        if collective.rank == 0 and (last or (every and trainer.step_index % every == 0)):
            evals[trainer.step_index] = trainer.evaluate()
        if on_step is not None:
            on_step(trainer, record)
        if not math.isfinite(record.loss):
            break
    layout = trainer.layout
    done = trainer.step_index
    summary = {
        "workers": layout.workers,
        "procs": layout.procs,
        "micro_batch": layout.micro_batch,
        "accum": layout.accum,
        "global_batch": layout.global_batch,
        "backend": layout.backend,
        "grads": trainer.path,
        "task": trainer.task.name,
        "optimizer": cfg.optim.name,
        "steps": done,
        "samples_seen": done * layout.global_batch,
        "dropped_samples": trainer.sampler.dropped_samples(done),
        "tail": cfg.train.tail,
        "final_loss": records[-1].loss if records else None,
        "eval": evals[max(evals)] if evals else {},
        "eval_history": {str(k): v for k, v in evals.items()},
        "final_params_l2": trainer.params_l2(),
        "peak_lr": trainer.recipe.peak_lr,
        "wall_seconds": time.perf_counter() - started,
    }
    summary.update(sync_summary(cfg, records))
    return summary


def sync_summary(cfg, records: list[StepRecord]) -> dict:
    stats = [r.sync for r in records if r.sync]
    out = {"sync": cfg.sync.name}
    if stats:
        for key, name in (("wire_bytes_per_worker", "wire_bytes_per_worker_step"), ("compression_ratio", "compression_ratio")):
            values = [s[key] for s in stats if key in s]
            out[name] = sum(values) / len(values) if values else None
        cos = [s["cosine_to_exact"] for s in stats if "cosine_to_exact" in s]
        out["mean_cosine_to_exact"] = sum(cos) / len(cos) if cos else None
    return out


def config_yaml(cfg) -> str:
    return OmegaConf.to_yaml(cfg, resolve=True)
