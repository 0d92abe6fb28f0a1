"""The training loop: one optimizer step (docs/design.md, "One optimizer step"), repeated.

    for each of k micro-batches: per-worker gradients   (grads.py)
    sync: compress per worker -> reduce in-process -> all-reduce -> ÷ W   (sync/)
    clip by global norm once, after averaging
    optimizer update (per-layer trust ratio for LARS/LAMB)
    telemetry

The engine knows nothing of any one compressor, optimizer or detector: it calls
their protocols. Every process runs this same loop on its own workers.
"""

import hashlib
import signal
import time
from pathlib import Path

import torch
from omegaconf import OmegaConf

from scaledrill.config.validate import validate_run
from scaledrill.dist import Collective
from scaledrill.errors import Interrupted
from scaledrill.nn.ghost_bn import set_global_statistics, set_group_size
from scaledrill.nn.stock import adapt_model
from scaledrill.optim import build_optimizer, clip_flat, resolve_recipe, set_lr
from scaledrill.sync import build_sync
from scaledrill.sync.compress.seeds import mix
from scaledrill.sync.path import grad_path
from scaledrill.sync.summary import sync_summary
from scaledrill.tasks.base import Task, build_task
from scaledrill.tasks.batches import cast_batch, check_finite
from scaledrill.tasks.sampler import make_sampler
from scaledrill.telemetry.layers import layer_stats
from scaledrill.telemetry.monitor import Monitor, StepRecord
from scaledrill.telemetry.settings import DEFAULTS as TELEMETRY_DEFAULTS
from scaledrill.train import checkpoint
from scaledrill.train.blame import WorkerBlame
from scaledrill.train.grads import GradComputer, flatten_params
from scaledrill.train.memory import check_fits
from scaledrill.train.overlap import OverlappedFused
from scaledrill.train.precision import Precision
from scaledrill.train.signals import StopFlag

DTYPES = {"float32": torch.float32, "float64": torch.float64}
NOISE_SALT = 0x6E6F6973  # keeps the noise step's draw of workers apart from every other stream of train.seed


def noise_sample(seed: int, step: int, W: int, k: int, hosted: range) -> list[int]:
    """Indices among the `hosted` global workers of the k of W a noise step measures, drawn from
    (seed, step) alone: the same global workers on every layout."""
    draw = torch.Generator().manual_seed(mix(seed, step, NOISE_SALT))
    chosen = range(W) if k >= W else torch.randperm(W, generator=draw)[:k].tolist()
    return sorted(w - hosted.start for w in chosen if w in hosted)


class Trainer:
    """State of one process's training run; `step()` advances one optimizer step."""

    def __init__(self, cfg, collective: Collective):
        self.cfg, self.comm = cfg, collective
        self.layout = validate_run(cfg)  # also when a Trainer is built without `scaledrill run`: the parts trust their nodes
        self.workers = self.layout.worker_ids(collective.rank)
        self.dtype = DTYPES[cfg.train.dtype]

        torch.manual_seed(cfg.train.seed)  # same initial parameters in every process
        self.task: Task = build_task(cfg.task)
        self.task.model, note = adapt_model(self.task.model, cfg.train.seed, batchnorm=cfg.train.convert_batchnorm)
        self.model = self.task.model.to(self.dtype)
        self._say(note)
        set_group_size(self.model, self.layout.micro_batch)
        self.model.train()

        self.sampler = make_sampler(self.task.data.train.size, self.layout, cfg.train)
        self.recipe = resolve_recipe(cfg, self.layout, self.task.data.train.size, cfg.train.tail)
        self.optimizer = build_optimizer(list(self.model.named_parameters()), cfg.optim)
        self.params = [p for p in self.model.parameters()]
        self.sync = build_sync(cfg.sync, self.layout, [p.shape for p in self.params], collective, cfg.train.seed, dtype=self.dtype)
        self.sync_is_exact = cfg.sync.name == "exact"  # read once: a config lookup costs tens of µs
        self.grads = GradComputer(self.model, self.task.loss, self.layout.per_proc)
        self.grads.on_fallback = self._fallback
        if self.sync.bitwise:
            # A threaded kernel splits its sums by thread count, and the launcher gives each process
            # cores/P threads: one thread in every process keeps each worker's row the same for any P.
            torch.set_num_threads(1)
        self.precision = Precision(cfg.train)  # autocast, 16-bit accumulation, loss scaling
        self.grads.accum_dtype = self.precision.accum_dtype
        self.path = self._choose_path(cfg.train.grads)
        self.kept = self.grads.kept_buffer() if self.path == "fused" else None  # the fused gradient, for the run
        self.overlap = self._overlap()
        check_fits(self)  # before the first step allocates
        self.batchnorm = cfg.train.batchnorm
        if self.batchnorm == "global":
            set_global_statistics(self.model, collective)  # the group is the process's V·b samples, summed over P
        # Averaged over processes every step (their tensors stay in place: restores and the vmap path copy into them).
        named = dict(self.model.named_buffers())
        self.running_stats = [named[n] for n in self.grads.running_stats] if collective.size > 1 else []
        self.step_index = 0
        # Read once: a config lookup costs tens of microseconds, several per step.
        tel = cfg.telemetry
        self.noise_every, self.layer_every = tel.noise_every, tel.layer_every
        self.noise_workers = tel.get("noise_workers", TELEMETRY_DEFAULTS.noise_workers)
        self.clip_norm = cfg.optim.clip_norm
        self.blame = WorkerBlame(self) if tel.get("blame", True) else None  # whose batch, when a detector fires
        # Set by the run to its monitor's `would_fire`: the blame then copies the weights only on a
        # step a detector will fire on (a copy of the model every step is a tenth of a large model's step).
        self.alarm = None

    def _say(self, line: str) -> None:
        """One line for the user, from rank 0 of a run that shows its progress."""
        if line and self.comm.rank == 0 and self.cfg.train.progress:
            print(line, flush=True)

    def _fallback(self, reason: str) -> None:
        V = self.layout.per_proc
        if getattr(self, "path", None) == "vmap":
            self.path = "loop"
        if getattr(self, "path", None) == "fused" and self.noise_every and self.noise_workers:
            W, k = self.layout.workers, self._sampled_count()
            self._say(f"noise scale: per-worker gradients take the loop path ({reason}), so each noise-scale step "
                      f"measures {k} of the {W} workers, drawn anew each step, one after another (an unbiased "
                      f"estimate; telemetry.noise_workers=0 measures all, ~{W} small passes a step)")
            return
        self._say(f"grads: the per-worker steps use the loop path for this run ({reason}); it runs the {V} workers of "
                  f"each process one after another, up to {V}x the forward/backward calls of vmap (an estimate)")

    def _choose_path(self, asked: str) -> str:
        chosen = grad_path(asked, self.cfg.sync)  # sync/path.py: the one rule
        if chosen == "vmap" and self.grads.vmap_failure is not None:
            self.grads.announce_fallback()
            return "loop"
        return chosen

    def _overlap(self) -> OverlappedFused | None:
        """The fused path with its all-reduce started during backward (train/overlap.py), where the
        sync allows it and the gradient is summed in the dtype it is synced in."""
        accum = self.precision.accum_dtype
        if self.path != "fused" or (accum is not None and accum != self.dtype):
            return None
        itemsize = self.dtype.itemsize
        starts = self.sync.bucket_starts(self.grads.flat.spans(), itemsize)
        return OverlappedFused(self.grads, starts, self.kept) if starts is not None else None

    # -- one step ------------------------------------------------------------
    def _micro_batches(self, step: int) -> list[dict]:
        index = self.sampler.worker_batches(step, self.workers)  # [k, V, b]
        micro = []
        for m in range(self.layout.accum):
            flat = index[m].reshape(-1)
            batch = self.task.data.train.take(flat)
            check_finite(batch, flat)
            micro.append(dict(cast_batch(batch, self.dtype), index=flat))
        return micro

    def _global_count(self, micro: list[dict]) -> float:
        """Units the step's loss is normalised by: samples, or valid tokens over all workers."""
        if not getattr(self.task.loss, "per_token", False):
            return float(self.layout.global_batch)
        local = torch.stack([torch.as_tensor(self.task.loss.count(b), dtype=torch.float64) for b in micro]).sum()
        self.comm.all_reduce(local)
        return float(local)

    def _share_scalars(self, values: list[float], buffers: list[torch.Tensor]):
        """One all-reduce per step for everything small: the step's scalars and the
        running statistics (averaged over processes, so they follow the mean over all
        W workers). In float64, where the sum of P float32 values is exact, so the
        average does not depend on the order the processes are summed in.

        Started here, finished by the returned function: the caller syncs the
        gradient meanwhile, so this small reduce costs no extra round trip."""
        if self.comm.size == 1:  # nothing to share: the sum over one process is the values themselves
            return lambda: values
        parts = [torch.tensor(values, dtype=torch.float64)] + [b.detach().reshape(-1).double() for b in buffers]
        shared = torch.cat(parts)
        pending = self.comm.all_reduce_start(shared)

        def finish() -> torch.Tensor:
            pending.wait()
            offset = len(values)
            with torch.no_grad():
                for buf in buffers:
                    buf.copy_((shared[offset : offset + buf.numel()] / self.comm.size).view_as(buf))
                    offset += buf.numel()
            return shared[: len(values)]

        return finish

    def _noise_due(self, step: int) -> bool:
        every = self.noise_every
        if self.layout.workers < 2 or not every or self.batchnorm == "global":
            return False  # global statistics tie the workers together: no per-worker gradients to measure
        return self.path != "fused" or step % every == 0  # per-worker paths measure it for free

    def _sampled_count(self) -> int:
        return min(self.noise_workers, self.layout.workers)

    def _noise_sample(self, step: int) -> list[int] | None:
        """This process's share of the workers a noise step measures one at a time, or None where all
        are measured at once (per-worker rules or vmap serve the model, or telemetry.noise_workers=0)."""
        if self.grads.vmap_failure is None or not self.noise_workers:
            return None
        self.grads.announce_fallback()  # once per run
        return noise_sample(self.cfg.train.seed, step, self.layout.workers, self._sampled_count(), self.workers)

    def _layers_due(self, step: int) -> bool:
        every = self.layer_every
        return bool(every) and step % every == 0

    def step(self) -> StepRecord:
        step = self.step_index
        micro = self._micro_batches(step)
        if self.blame is not None:
            self.blame.before(step, micro)
        scale = self.layout.workers / self._global_count(micro)
        noise = self._noise_due(step)
        self.grads.step = step  # keys the dropout masks
        S = self.precision.loss_scale  # 1 unless the loss is scaled
        if noise and not self.grads.settled:  # the per-worker route is chosen before this step takes one
            with self.precision.autocast():
                self.grads.settle(micro, scale * S)
        # A noise step on exact averaging needs each worker's |g|², not its gradient: the rules give
        # it from the fused pass once their trial agreed with vmap (GradComputer.settle).
        norms_only = noise and self.path == "fused" and self.sync_is_exact and self.grads.rules_ready
        # A model only the loop gives per-worker gradients for (recurrent layers) measures a sample of the
        # workers, one at a time beside the fused pass: all W would cost ~W small passes (20x a step).
        sampled = self._noise_sample(step) if noise and self.path == "fused" and not norms_only else None
        path = "vmap" if noise and self.path == "fused" and not norms_only and sampled is None else self.path
        overlapped = self.overlap is not None and path == "fused" and not norms_only
        with self.precision.autocast():
            if norms_only:
                result = self.grads.fused_square_norms(micro, scale * S, self.kept)
            elif overlapped:
                result = self.overlap.compute(micro, scale * S)
            elif path == "fused":
                result = self.grads.fused(micro, scale * S, into=self.kept)
            else:
                result = self.grads.compute(micro, scale * S, path)
            if sampled is not None:  # an overlapped step's all-reduce is in flight meanwhile
                result.worker_square = self.grads.sampled_square_norms(micro, scale * S, sampled)
        result.local = self.precision.widen(result.local, self.dtype)
        flag = getattr(self, "stop_flag", None)
        local_sq = 0.0
        if noise:  # before the sync may reuse `local`
            local_sq = result.worker_square if result.worker_square is not None else _square_norm(result.local)
        shared = self._share_scalars([result.loss_sum, local_sq, float(flag.signum if flag else 0)], self.running_stats)
        exact = self._exact_sum(result.local) if noise and not self.sync_is_exact else None
        if overlapped:
            self.overlap.wait()  # the buckets' all-reduces, started during backward
        average = self.sync.reduce(result.local, self.workers, step, donate=True, summed=overlapped)
        scalars = shared()
        W = self.layout.workers
        small_sq = big_sq = None
        if noise:
            small_sq = float(scalars[1]) / (self._sampled_count() if sampled is not None else W) / S**2
            big_sq = _square_norm(average if exact is None else exact / self.layout.workers) / S**2

        self.grads.write_grads(average)  # every .grad is a view of `average`
        layers_due = self._layers_due(step)
        verdict = self.precision.after_reduce(average, [p.grad for p in self.params] if layers_due else None, self.grads.names)
        clip = self.clip_norm
        grad_norm = clip_flat(average, clip) if verdict.apply else float("nan")  # the .grads are views of `average`: one norm, one scale
        if not verdict.apply:  # an inf/NaN in the scaled gradient: the step is skipped (train/precision.py)
            small_sq = big_sq = None
        record = StepRecord(
            step=step,
            loss=float(scalars[0]) / W / S,
            lr=self.recipe.lr_at(step),
            grad_norm=float(grad_norm),
            clipped_norm=min(float(grad_norm), clip) if clip else float(grad_norm),
            small_sq=small_sq,
            big_sq=big_sq,
            sync=dict(self.sync.stats),
            interrupt=bool(scalars[2] > 0),
            signum=(flag.signum if flag else 0) or _one_signal(float(scalars[2]), self.comm.size),
            precision=verdict.scalars,
            skipped=not verdict.apply,
        )
        if self.blame is not None and (self.alarm is None or self.alarm(record)):
            self.blame.keep_params()  # the weights before the update, for the per-worker rerun of a firing step
        layers = None
        if verdict.apply:
            set_lr(self.optimizer, record.lr)
            before = [p.detach().clone() for p in self.params] if layers_due else None
            self.optimizer.step()
            if layers_due:
                updates = [p.detach() - b for p, b in zip(self.params, before)]
                layers = layer_stats(self.grads.names, self.params, [p.grad for p in self.params], updates)
        for name, shares in (verdict.layers or {}).items():
            layers = layers or {}
            layers.setdefault(name, {}).update(shares)
        trust = getattr(self.optimizer, "trust_ratios", None)
        record.layers, record.trust = layers, dict(trust) if trust and layers_due else None
        self.step_index += 1
        return record

    def _exact_sum(self, local: torch.Tensor) -> torch.Tensor:
        """Σ over all workers of the uncompressed gradients: the noise scale's big batch."""
        exact = local.sum(0)
        self.comm.all_reduce(exact)
        return exact

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
                batch = cast_batch(test.take(index), self.dtype)
                with self.precision.autocast():
                    out = self.model(batch["input"])
                units += float(loss.count(batch))
                for k, v in loss.metrics(out, batch).items():
                    sums[k] = sums.get(k, 0.0) + float(v)
            return {k: v / units for k, v in sums.items()}
        finally:
            self.model.train()

    def params_l2(self) -> float:
        return float(flatten_params(self.params).double().norm())


def run_training(cfg, collective: Collective, run_dir=None, on_step=None) -> dict:
    """Train for cfg.train.steps steps; returns the summary (meaningful on rank 0).

    Checkpoints go to RUN_DIR/checkpoints every train.checkpoint_every steps and at
    the end; `resume` continues from one. SIGINT/SIGTERM stop every process after
    the current step, write a checkpoint and raise Interrupted. `on_step(trainer,
    record)` may return True to end the run early (a goal was met).
    """
    started = time.perf_counter()
    trainer = Trainer(cfg, collective)
    layout = trainer.layout
    monitor = Monitor(cfg, run_dir, collective.rank, layout.micro_batch * layout.accum, layout.global_batch, config_yaml(cfg))
    monitor.blame = trainer.blame.report if trainer.blame is not None else None
    trainer.alarm = monitor.would_fire
    if cfg.get("resume"):
        state = checkpoint.load(cfg.resume)
        checkpoint.restore(trainer, monitor, state)
        monitor.last_checkpoint = state["path"]
    ckpt_dir = Path(run_dir) / "checkpoints" if run_dir is not None else None
    steps, every, ckpt_every = cfg.train.steps, cfg.train.eval_every, cfg.train.checkpoint_every
    records: list[StepRecord] = []
    evals: dict[int, dict] = {}
    stopped = None
    stopped_early = False
    status = "failed"
    first_step = trainer.step_index
    try:
        with StopFlag() as flag:
            trainer.stop_flag = flag
            for _ in range(trainer.step_index, steps):
                record = trainer.step()
                records.append(record)
                stopped = monitor.observe(record)
                last = trainer.step_index == steps or stopped is not None or record.interrupt
                if collective.rank == 0 and (last or (every and trainer.step_index % every == 0)):
                    evals[trainer.step_index] = trainer.evaluate()
                if ckpt_dir is not None and (record.interrupt or trainer.step_index == steps or (ckpt_every and trainer.step_index % ckpt_every == 0)):
                    monitor.flush()  # first: the store then holds every step the newest checkpoint covers, even after kill -9
                    saved = checkpoint.save(trainer, monitor, ckpt_dir)
                    monitor.last_checkpoint = str(saved) if saved else monitor.last_checkpoint
                if on_step is not None and on_step(trainer, record):
                    stopped_early = True  # the caller's goal (e.g. a ladder's target) is met
                if record.interrupt:
                    status = "interrupted"
                    monitor.close(status)
                    raise Interrupted(
                        f"stopped by a signal after step {trainer.step_index}; a checkpoint is in {ckpt_dir}; "
                        f"continue with: scaledrill run resume={ckpt_dir} (plus the same overrides)",
                        record.signum,
                    )
                if stopped is not None or stopped_early:
                    break
        status = "diverged" if stopped else "finished"
    finally:
        monitor.close(status)
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
        "resumed_from_step": first_step if cfg.get("resume") else None,
        "samples_seen": done * layout.global_batch,
        "dropped_samples": trainer.sampler.dropped_samples(done),
        "tail": cfg.train.tail,
        "final_loss": records[-1].loss if records else None,
        "eval": evals[max(evals)] if evals else {},
        "eval_history": {str(k): v for k, v in evals.items()},
        "final_params_l2": trainer.params_l2(),
        "params_digest": hashlib.sha256(b"".join(p.detach().contiguous().numpy().tobytes() for p in trainer.params)).hexdigest(),
        "peak_lr": trainer.recipe.peak_lr,
        "diverged": stopped is not None,
        "stop_reason": stopped,
        "stopped_early": stopped_early,
        "last_checkpoint": monitor.last_checkpoint,
        "wall_seconds": time.perf_counter() - started,
    }
    summary.update(monitor.summary())
    summary.update(trainer.precision.summary())
    summary.update(sync_summary(cfg.sync.name, [r.sync for r in records]))
    return summary


def _square_norm(x: torch.Tensor) -> float:
    """Σx²: each row's norm in x's own dtype (one worker's gradient on a noise-scale step, where
    float32's relative rounding of ~1e-6 is far inside the estimate's own noise), the rows'
    squares summed in float64. A float64 reduction over all of [V, n] took 3-4x as long."""
    return float(torch.linalg.vector_norm(x, dim=-1).double().square().sum())


def _one_signal(total: float, procs: int) -> int:
    """The signal behind a stop flag summed over the processes, when this process saw none itself."""
    for signum in (signal.SIGINT, signal.SIGTERM):
        if total % int(signum) == 0 and 0 < total <= procs * int(signum):
            return int(signum)
    return int(signal.SIGINT)


def config_yaml(cfg) -> str:
    return OmegaConf.to_yaml(cfg, resolve=True)
