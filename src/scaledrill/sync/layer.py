"""The sync layer: per-worker gradients in, the global average out.

Called once per optimizer step with `local`, this process's gradients in
worker-mean scale (the true gradient is (1/W)·Σ_w g_w):
- [V, n], one row per hosted worker, when `per_worker` is True;
- [1, n], the sum over the hosted workers, otherwise (the fused path).

Steps:
1. compress each worker's row (with error feedback if asked);
2. sum the decompressed rows in the process, all-reduce per bucket, divide by W;
3. if `sync.fidelity`, average the same rows exactly (one more sum and
   all-reduce) and compare.
With `sync.bitwise` every sum of step 2 follows one fixed tree over global worker
ids (tree.py) instead of the all-reduce, so layouts agree to the bit.
The result is identical on every process and does not depend on P.
"""

import math
from dataclasses import fields, is_dataclass, replace

import torch

from scaledrill.sync.buckets import bucketed_sum
from scaledrill.sync.compress import Round, build, dense_bytes
from scaledrill.sync.feedback import ErrorFeedback
from scaledrill.sync.overlap import BucketStarts
from scaledrill.sync.path import per_worker_cause
from scaledrill.sync.settings import settings_of
from scaledrill.sync.tree import tree_sum


class SyncLayer:
    def __init__(self, compressor, layout, shapes, collective, seed, bucket_kib, fidelity, dtype, bitwise=False, per_worker=False):
        self.compressor, self.layout, self.collective = compressor, layout, collective
        self.bitwise = bitwise
        self.per_worker = per_worker  # wants one row per hosted worker (path.py decides, from the config)
        self.seed, self.bucket_kib, self.fidelity = seed, bucket_kib, fidelity
        self.n = sum(math.prod(s) for s in shapes)
        self.state = compressor.init(list(shapes), layout.per_proc, seed, dtype)
        self.calls = 0
        self.stats: dict[str, float] = {}

    @property
    def fidelity_reads_local(self) -> bool:
        return self.fidelity and not self.compressor.lossless  # 3. reads `local` after the update

    def _sum(self, rows: torch.Tensor, in_place: bool = False) -> torch.Tensor:
        if self.bitwise:
            return tree_sum(rows, self.collective, self.bucket_kib)
        return bucketed_sum(rows, self.collective, self.bucket_kib, in_place)

    def _mean(self, rows: torch.Tensor, in_place: bool = False) -> torch.Tensor:
        return self._sum(rows, in_place).div_(self.layout.workers)

    @staticmethod
    def _summed(rows: torch.Tensor, in_place: bool = False) -> torch.Tensor:
        """The `_sum` of a row that `bucket_starts` already summed over the processes."""
        return rows[0] if in_place else rows[0].clone()

    def _summed_mean(self, rows: torch.Tensor, in_place: bool = False) -> torch.Tensor:
        return self._summed(rows, in_place).div_(self.layout.workers)

    def bucket_starts(self, spans: list[tuple[int, int]], itemsize: int) -> BucketStarts | None:
        """Per-bucket all-reduces a caller starts during backward (overlap.py), where they give
        the very sum `reduce` would: exact averaging of a per-process sum over P > 1 processes.
        None where they would not (a compressor, the bitwise tree, one process)."""
        if self.bitwise or self.per_worker or not self.compressor.lossless or self.collective.size == 1:
            return None
        return BucketStarts(self.collective, spans, itemsize, self.bucket_kib)

    def reduce(self, local: torch.Tensor, workers: range, step: int, donate: bool = False, summed: bool = False) -> torch.Tensor:
        """The global average of this step; `donate` lets the layer overwrite `local`
        (the engine's fused path does: it never reads `local` again). `summed`: `local`
        already holds the sum over processes (the caller ran `bucket_starts`' all-reduces)."""
        want = len(workers) if self.per_worker else 1
        if local.dim() != 2 or local.shape[1] != self.n or local.shape[0] not in (want, len(workers)):
            raise ValueError(f"expected local of shape [{want}, {self.n}], got {tuple(local.shape)}")
        if summed and (self.bitwise or self.per_worker or not self.compressor.lossless):
            raise ValueError("summed=True needs exact averaging of a per-process sum (see bucket_starts)")
        W = self.layout.workers
        total, mean = (self._summed, self._summed_mean) if summed else (self._sum, self._mean)
        rnd = Round(step, workers, W, self.seed, total, mean, donate and not self.fidelity_reads_local)
        out, self.state = self.compressor.update(local, self.state, rnd)  # 1. and 2.
        self.calls += 1
        full = dense_bytes(self.n, local.dtype)
        stats = {
            "wire_bytes_per_worker": float(out.wire_bytes),
            "uncompressed_bytes": float(full),
            "compression_ratio": full / out.wire_bytes,
            **out.stats,
        }
        if self.fidelity and self.compressor.lossless:  # 3., known without arithmetic: the mean is the exact one
            stats["cosine_to_exact"], stats["rel_error_to_exact"] = 1.0, 0.0
        elif self.fidelity:  # 3.
            exact = self._mean(local)
            diff, size = (out.mean - exact).double().norm(), exact.double().norm()
            stats["cosine_to_exact"] = float(torch.nn.functional.cosine_similarity(out.mean.double(), exact.double(), dim=0))
            stats["rel_error_to_exact"] = float(diff / size) if size > 0 else float(diff > 0)
        self.stats = stats
        return out.mean

    def state_dict(self) -> dict:
        """Keys "worker.*" hold [V, ...] rows in the order of this process's workers."""
        return {"calls": self.calls, **_flatten(self.state)}

    def load_state_dict(self, d: dict) -> None:
        self.calls = int(d["calls"])
        self.state = _restore(self.state, d)


def _flatten(state, prefix: str = "") -> dict:
    out = {}
    for f in fields(state):
        value = getattr(state, f.name)
        if is_dataclass(value):
            out.update(_flatten(value, f"{prefix}{f.name}."))
        elif f.name.startswith("worker_"):
            out[f"worker.{prefix}{f.name[len('worker_'):]}"] = value
        else:
            out[f"{prefix}{f.name}"] = value
    return out


def _restore(state, d: dict, prefix: str = ""):
    changes = {}
    for f in fields(state):
        value = getattr(state, f.name)
        if is_dataclass(value):
            changes[f.name] = _restore(value, d, f"{prefix}{f.name}.")
            continue
        key = f"worker.{prefix}{f.name[len('worker_'):]}" if f.name.startswith("worker_") else f"{prefix}{f.name}"
        new = d[key]
        if isinstance(value, torch.Tensor) and tuple(new.shape) != tuple(value.shape):
            raise ValueError(f"{key}: shape {tuple(new.shape)} does not match {tuple(value.shape)}")
        changes[f.name] = new.to(value.dtype).clone() if isinstance(value, torch.Tensor) else new
    return replace(state, **changes)


def build_sync(cfg, layout, shapes, collective, seed: int, dtype: torch.dtype = torch.float32) -> SyncLayer:
    """The sync layer that `cfg` (the `sync` node, checked by config/rules.py) describes, for this layout and model."""
    cfg = settings_of(cfg)  # the keys not given take their compressor's defaults
    compressor = build(cfg)
    if cfg.error_feedback:
        compressor = ErrorFeedback(compressor)
    per_worker = per_worker_cause(cfg) is not None
    return SyncLayer(compressor, layout, shapes, collective, seed, float(cfg.bucket_kib), cfg.fidelity, dtype, cfg.bitwise, per_worker)
