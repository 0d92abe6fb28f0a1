"""Gradients of one process's workers for one optimizer step.

Three paths, one result convention. Worker w's gradient g_w is in "worker-mean
scale": the global-batch gradient is (1/W)·Σ_w g_w. Each micro-loss is the SUM
of per-unit losses times W / N, with N the global count of units (samples, or
valid tokens) in the whole step, so token-level losses are normalised by the
global token count and never as a mean of micro-batch means.

- fused: one forward/backward per micro-step over all V·b samples of the process;
  returns [1, n] = Σ over this process's workers of g_w. Ghost batch
  normalization (group = b) keeps BatchNorm statistics per worker.
- vmap: per-worker gradients; returns [V, n]. When every module holding
  parameters has a per-worker rule (rows.py: Linear, LayerNorm, Embedding,
  Conv2d, GhostBatchNorm), the rows come from one fused forward/backward, once
  a trial has checked them against torch.func.vmap (settle); otherwise by vmap,
  where BatchNorm buffers go in batched (one copy per worker) and come back as
  their mean.
- loop: the same [V, n] one worker at a time, for modules vmap cannot handle.
  The first time vmap fails on a model (recurrent layers, in-place or
  data-dependent code), this run falls back to loop for good and says so once.

Before every forward, sample-keyed dropout modules learn the global indices of the
samples and the step (scaledrill.nn.dropout.key_samples), so every path drops the
same units of the same sample.

Every path accumulates over the k micro-steps and returns flat vectors in
`model.parameters()` order.
"""

import math
import warnings
from dataclasses import dataclass

import torch
from torch.func import functional_call, grad, vmap

from scaledrill.errors import ScaledrillError
from scaledrill.nn.dropout import key_samples, sample_dropouts
from scaledrill.tasks.base import forward_loss
from scaledrill.train.rows import RuleRows, agree, rule_cause

# Modules torch.func.vmap cannot run per worker (their kernels take no batched inputs).
NO_VMAP = (torch.nn.RNNBase,)


@dataclass
class StepGrads:
    local: torch.Tensor  # [1, n] (fused) or [V, n] (per-worker)
    loss_sum: float  # Σ of the process's scaled micro-losses, i.e. its share of the global mean loss
    worker_square: float | None = None  # Σ over the process's (or a sample of its) workers of |g_w|², when asked without rows


class GradComputer:
    """Computes StepGrads for the micro-batches of one process."""

    def __init__(self, model: torch.nn.Module, loss, workers_per_proc: int):
        self.model, self.loss, self.V = model, loss, workers_per_proc
        self.names = [name for name, _ in model.named_parameters()]
        self.params = [p for _, p in model.named_parameters()]
        self.buffer_names = [name for name, _ in model.named_buffers()]
        # Running statistics are averaged across processes; other buffers (constants,
        # integer counters) are the same everywhere and are left alone.
        self.running_stats = [name for name, b in model.named_buffers() if b.is_floating_point() and "running_" in name.rsplit(".", 1)[-1]]
        self.numel = sum(p.numel() for p in self.params)
        self.flat = FlatLayout(self.params)
        self.dropouts = sample_dropouts(model)
        self._written: tuple = (None, [])  # (pointer, size, dtype) of the vector the .grads view, and those views
        self.step = 0  # the optimizer step, which keys the dropout masks
        self.announced = False
        self.on_fallback = None  # called once with the reason when vmap fails and loop takes over
        # Per-worker rows from one fused pass: None when a module has no rule or the trial failed.
        self.rule_cause = rule_cause(model)
        self.rules = RuleRows(model, self.params, workers_per_proc) if self.rule_cause is None else None
        self.settled = False  # which per-worker route serves the model is decided (settle)
        self.vmap_failure = next((f"{type(m).__name__} has no per-worker (vmap) kernel" for m in model.modules()
                                  if isinstance(m, NO_VMAP)), None)
        self.accum_dtype = None  # dtype the micro-batch gradients are summed in; None = the parameters' (train/precision.py)

    def _sum_loss(self, batch: dict, scale: float) -> torch.Tensor:
        """The scaled loss sum of `batch`, its dropout masks keyed by its samples and the step."""
        key_samples(self.dropouts, batch.get("index"), self.step)
        return forward_loss(self.model, self.loss, batch) * scale

    def _accumulator(self, rows: int) -> torch.Tensor:
        return torch.zeros(rows, self.numel, dtype=self.accum_dtype or self.params[0].dtype)

    # -- fused ---------------------------------------------------------------
    def fused(self, micro: list[dict], scale: float, into: "KeptBuffer | None" = None) -> StepGrads:
        """`into`: a buffer the caller keeps across steps (the result is then its tensor, overwritten
        by the next call); else a fresh one."""
        out, views = None, None
        total = 0.0
        for batch in micro:
            value = self._sum_loss(batch, scale)
            grads = torch.autograd.grad(value, self.params)
            if out is None:  # the first micro-step's gradients are the buffer: one copy, no zero fill
                if into is not None:
                    out, views = into.flat, into.views
                    torch._foreach_copy_(views, grads)  # casts to train.accum_dtype, as .to() below rounds
                else:
                    out = torch.cat([g.reshape(-1) for g in grads]).unsqueeze(0)
                    if self.accum_dtype is not None and out.dtype != self.accum_dtype:
                        out = out.to(self.accum_dtype)  # train.accum_dtype: the sum of the micro-steps in 16 bits
                    views = self.flat.views(out[0])
            else:
                torch._foreach_add_(views, grads)
            total += float(value.detach())
        return StepGrads(out, total)

    def fused_square_norms(self, micro: list[dict], scale: float, into: "KeptBuffer") -> StepGrads:
        """`fused` into `into`, plus each worker's squared gradient norm summed over the process's
        workers, from the same pass (RuleRows.fused_square_norms): a noise step without rows."""
        total, square = self.rules.fused_square_norms(self._forward_sum(scale), micro, into.views)
        return StepGrads(into.flat, total, worker_square=square)

    @property
    def rules_ready(self) -> bool:
        """The per-worker rules serve this model (settled: their trial agreed with vmap)."""
        return self.rules is not None and self.settled

    def kept_buffer(self) -> "KeptBuffer":
        """A [1, n] gradient buffer for `fused(into=...)`, in the dtype the micro-steps are summed in."""
        return KeptBuffer(torch.zeros(1, self.numel, dtype=self.accum_dtype or self.params[0].dtype), self.flat)

    # -- per worker ----------------------------------------------------------
    def _split(self, batch: dict) -> dict:
        """[V·b, ...] -> [V, b, ...] for every tensor of the batch."""
        return {k: v.view(self.V, -1, *v.shape[1:]) for k, v in batch.items()}

    def _batched_buffers(self) -> dict:
        named = dict(self.model.named_buffers())
        return {n: named[n].detach().unsqueeze(0).repeat(self.V, *[1] * named[n].dim()) for n in self.buffer_names}

    def _store_buffer_mean(self, batched: dict) -> None:
        named = dict(self.model.named_buffers())
        with torch.no_grad():
            for n, value in batched.items():
                named[n].copy_(value.mean(0) if value.is_floating_point() else value[0])

    def vmap(self, micro: list[dict], scale: float) -> StepGrads:
        """Per-worker gradients by the rules of rows.py, by torch.func.vmap, or by loop once vmap has failed on this model."""
        self.settle(micro, scale)
        if self.rules is not None:
            rows, total = self.rules.compute(self.model, self._forward_sum(scale), micro, self.accum_dtype or self.params[0].dtype)
            return StepGrads(rows, total)
        return self._per_worker(micro, scale)

    def _forward_sum(self, scale: float):
        return lambda batch: self._sum_loss(batch, scale)

    def settle(self, micro: list[dict], scale: float) -> None:
        """Decide once, before a step uses per-worker gradients, which route serves this model: the
        rules (checked against vmap on this step's batch), vmap, or loop (vmap failed on it). The
        trial's results are thrown away and the buffers put back, so which route a step takes, and
        so its bits, depend on the model alone and not on the step a run started from: a resumed
        run repeats the uninterrupted one exactly (the first step used to keep the trial's result)."""
        if self.settled:
            return
        named = dict(self.model.named_buffers())
        start = {n: b.detach().clone() for n, b in named.items()}
        try:
            if self.rules is not None:
                self._check_rules(micro, scale)
            elif self.vmap_failure is None:
                self._try_vmap(micro, scale)
        finally:
            with torch.no_grad():
                for n, b in named.items():
                    b.copy_(start[n])
            self.settled = True

    def _check_rules(self, micro: list[dict], scale: float) -> None:
        """Rows by the rules, then by vmap (or loop) from the same buffers; keep the rules if they agree."""
        named = dict(self.model.named_buffers())
        start = {n: b.detach().clone() for n, b in named.items()}
        try:
            rows, _ = self.rules.compute(self.model, self._forward_sum(scale), micro, self.accum_dtype or self.params[0].dtype)
        except ScaledrillError:
            raise
        except Exception as err:  # noqa: BLE001 - a model the rules do not fit fails in many ways
            rows, self.rule_cause = None, f"{type(err).__name__}: {err}"
        with torch.no_grad():
            for n, b in named.items():
                b.copy_(start[n])
        reference = self._per_worker(micro, scale)
        if rows is not None and not agree(rows, reference.local, self.params):
            self.rule_cause = "its rows differ from vmap's (a parameter used outside its module, or samples not along dim 0)"
        if self.rule_cause is not None:
            self.rules = None

    def _per_worker(self, micro: list[dict], scale: float) -> StepGrads:
        result = self._try_vmap(micro, scale) if self.vmap_failure is None else None
        if result is None:
            result = self.loop(micro, scale)  # a model that fails here too is named by forward_loss
            self.announce_fallback()
        return result

    def _try_vmap(self, micro: list[dict], scale: float) -> StepGrads | None:
        """vmap's result, or None with the reason kept in vmap_failure: this run then loops for good."""
        try:
            with warnings.catch_warnings():  # torch's note that a kernel runs unbatched under vmap: slower, still exact
                warnings.filterwarnings("ignore", message="There is a performance drop")
                return self._vmap(micro, scale)
        except ScaledrillError:
            raise
        except Exception as err:  # noqa: BLE001 - vmap's limits show up as many kinds of error
            key_samples(self.dropouts, None)
            self.vmap_failure = f"torch.func.vmap failed: {type(err).__name__}: {str(err).splitlines()[0][:200]}"
            return None

    def announce_fallback(self) -> None:
        if not self.announced and self.on_fallback is not None:
            self.on_fallback(self.vmap_failure)
        self.announced = True

    def _vmap(self, micro: list[dict], scale: float) -> StepGrads:
        params = {n: p.detach() for n, p in zip(self.names, self.params)}
        buffers = self._batched_buffers()
        model, loss, step = self.model, self.loss, self.step

        dropouts = self.dropouts

        def worker_loss(p, b, batch):
            key_samples(dropouts, batch.get("index"), step)
            out = functional_call(model, (p, b), (batch["input"],), strict=False)
            value = loss(out, batch).reshape(()) * scale
            return value, value

        per_worker = vmap(grad(worker_loss, has_aux=True), in_dims=(None, 0, 0))
        out = self._accumulator(self.V)
        total = 0.0
        for batch in micro:
            grads, values = per_worker(params, buffers, self._split(batch))
            out += torch.cat([grads[n].reshape(self.V, -1) for n in self.names], dim=1)
            total += float(values.sum())
        key_samples(dropouts, None)  # no batched tensor outlives the transform
        self._store_buffer_mean(buffers)
        return StepGrads(out, total)

    def loop(self, micro: list[dict], scale: float) -> StepGrads:
        named = dict(self.model.named_buffers())
        start = {n: named[n].detach().clone() for n in self.buffer_names}
        ends = {n: torch.zeros_like(t) for n, t in start.items()}
        out = self._accumulator(self.V)
        total = 0.0
        split = [self._split(batch) for batch in micro]
        for v in range(self.V):
            total += self._one_worker(split, v, scale, out[v], start)
            for n in ends:
                ends[n] += named[n].detach()
        with torch.no_grad():
            for n, t in ends.items():
                named[n].copy_(t / self.V if t.is_floating_point() else t // self.V)
        return StepGrads(out, total)

    def _one_worker(self, split: list[dict], v: int, scale: float, into: torch.Tensor, start: dict) -> float:
        """Hosted worker v's gradient added into the flat row `into`, the buffers first set to
        `start` (every worker begins from the step's state); returns its scaled loss sum."""
        named = dict(self.model.named_buffers())
        with torch.no_grad():
            for n, t in start.items():
                named[n].copy_(t)
        views, total = self.flat.views(into), 0.0
        for batch in split:
            value = self._sum_loss({k: t[v] for k, t in batch.items()}, scale)
            torch._foreach_add_(views, torch.autograd.grad(value, self.params))
            total += float(value.detach())
        return total

    def sampled_square_norms(self, micro: list[dict], scale: float, chosen: list[int]) -> float:
        """Σ |g_v|² over the hosted workers `chosen` (indices among this process's V), each computed
        as `loop` does, the buffers left as they were: a noise step on a model whose per-worker
        gradients only the loop gives (recurrent layers), for a sample of the workers
        (telemetry.noise_workers) instead of all of them."""
        named = dict(self.model.named_buffers())
        start = {n: named[n].detach().clone() for n in self.buffer_names}
        row, split = self._accumulator(1)[0], [self._split(batch) for batch in micro]
        total = 0.0
        try:
            for v in chosen:
                row.zero_()
                self._one_worker(split, v, scale, row, start)
                total += float(row.double().square().sum())
        finally:
            with torch.no_grad():
                for n, t in start.items():
                    named[n].copy_(t)
        return total

    def compute(self, micro: list[dict], scale: float, path: str) -> StepGrads:
        return getattr(self, path)(micro, scale)

    def write_grads(self, flat: torch.Tensor) -> None:
        """Give every parameter its slice of the averaged flat gradient as `.grad`
        (nothing to do when they already are: a kept buffer, step after step)."""
        where = (flat.data_ptr(), flat.numel(), flat.dtype)
        if where == self._written[0] and all(p.grad is g for p, g in zip(self.params, self._written[1])):
            return
        views = self.flat.views(flat)
        for p, view in zip(self.params, views):
            p.grad = view
        self._written = (where, views)


@dataclass
class KeptBuffer:
    """A flat gradient buffer kept for a whole run, with its per-parameter views: a fresh vector
    of a large model is memory the kernel backs page by page on every step."""

    flat: torch.Tensor  # [1, n]
    layout: "FlatLayout"

    def __post_init__(self):
        self.views = self.layout.views(self.flat[0])


class FlatLayout:
    """Where each parameter sits in a flat vector in `model.parameters()` order.

    Worked out once: a view per parameter is then one `as_strided` call (slicing and
    reshaping cost two calls and their checks, a visible share of a 1 ms step)."""

    def __init__(self, params: list[torch.Tensor]):
        self.spec, offset = [], 0
        for p in params:
            self.spec.append((tuple(p.shape), _contiguous_strides(p.shape), offset))
            offset += p.numel()
        self.numel = offset

    def spans(self) -> list[tuple[int, int]]:
        """(offset, numel) of each parameter, in order."""
        return [(offset, math.prod(shape)) for shape, _, offset in self.spec]

    def views(self, flat: torch.Tensor) -> list[torch.Tensor]:
        """Views of the contiguous 1-d `flat` shaped like each parameter, in order."""
        if flat.dim() != 1 or flat.numel() != self.numel or flat.stride(0) != 1:
            raise ValueError(f"expected a contiguous vector of {self.numel} values, got shape {tuple(flat.shape)}")
        base = flat.storage_offset()
        return [flat.as_strided(shape, strides, base + offset) for shape, strides, offset in self.spec]


def _contiguous_strides(shape) -> tuple[int, ...]:
    strides, step = [], 1
    for size in reversed(tuple(shape)):
        strides.append(step)
        step *= size
    return tuple(reversed(strides))


def flatten_params(params: list[torch.Tensor]) -> torch.Tensor:
    return torch.cat([p.detach().reshape(-1) for p in params])
