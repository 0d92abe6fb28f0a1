"""Which worker blew up: each worker's loss and gradient norm at a detector's step.

Why: on a cluster a divergence often starts in one rank's batch (a corrupted or
extreme sample); the question after "when" is "whose batch, which samples". The
rehearsal knows each worker's sample indices, so it can answer exactly.

How:
1. Before every step the engine hands over the step's micro-batches and the
   buffers are copied (the forward moves running statistics). The parameters are
   copied before the optimizer moves them, on the steps the monitor's detectors will
   fire on (`Monitor.would_fire`, asked once the loss and gradient norm are known):
   a copy of the model every step is a tenth of a large model's step.
2. When a detector fires, every process puts the copy back, runs each of its
   workers alone (the per-worker loop path, whatever path the run used: it runs
   any module), reads the worker's mean loss over its k·b samples, the norm of the
   gradient of that mean, and each sample's loss, then restores the live state.
3. The processes gather the rows of all W workers in global-id order.
4. Outliers by a robust rule: the modified z-score (x − median) / (1.4826 · MAD)
   over the W workers, above 3.5 for the loss or the gradient norm (Iglewicz and
   Hoaglin 1993, "How to Detect and Handle Outliers", from memory); the spread is
   floored at 1e-3·|median| so W identical workers name none, and a non-finite
   value stands out unless all are non-finite. One-sided: a worker
   doing better than the rest is not blamed. Fewer than 3 workers name none (the
   median of two is their mean).
5. For each outlier: its sample indices in micro-batch order, and those samples
   ranked by their own loss, the worst first.
"""

import math
import statistics

import torch

from scaledrill.nn.dropout import key_samples

MODIFIED_Z = 3.5
MAD_TO_SIGMA = 1.4826


def robust_outliers(values: list[float], limit: float = MODIFIED_Z) -> list[int]:
    """Step 4: positions whose modified z-score exceeds `limit` (non-finite values always do)."""
    finite = [v for v in values if math.isfinite(v)]
    if len(values) < 3 or not finite:
        return []  # too few workers for a median to stand against, or all alike non-finite
    med = statistics.median(finite)
    mad = statistics.median(abs(v - med) for v in finite)
    spread = max(MAD_TO_SIGMA * mad, 1e-3 * abs(med), 1e-12)
    return [i for i, v in enumerate(values) if not math.isfinite(v) or (v - med) / spread > limit]


class WorkerBlame:
    def __init__(self, trainer):
        self.trainer = trainer
        self.step: int | None = None
        self.micro: list[dict] = []
        # The engine's tensors stay in place for the run (restores and the per-worker paths copy into
        # them), so they are listed once: a walk over the modules every step costs a small model's step.
        self.params = dict(trainer.model.named_parameters())
        self.buffers = dict(trainer.model.named_buffers())
        self.saved: dict[str, torch.Tensor] = {}  # parameters by name, before the update of step `saved_step`
        self.saved_step: int | None = None
        self.saved_buffers: dict[str, torch.Tensor] = {}

    def before(self, step: int, micro: list[dict]) -> None:
        """Step 1, before the forward passes (they move the running statistics)."""
        self.step, self.micro = step, micro
        self.saved_buffers = _copy_into(self.saved_buffers, self.buffers)

    def keep_params(self) -> None:
        """Step 1, for the parameters: any time before the optimizer moves them. The engine calls it
        on the steps its monitor will find a detector firing on (every step without a monitor)."""
        self.saved = _copy_into(self.saved, self.params)
        self.saved_step = self.step

    def _swap(self, params: dict[str, torch.Tensor], buffers: dict[str, torch.Tensor]) -> None:
        with torch.no_grad():
            for live, values in ((self.params, params), (self.buffers, buffers)):
                for n, value in values.items():
                    live[n].copy_(value)

    def _worker_rows(self) -> tuple[torch.Tensor, torch.Tensor]:
        """Step 2: [V, 2] (mean loss, gradient norm) and [V, k·b] per-sample losses of this process's workers."""
        t = self.trainer
        model, loss, V = t.model, t.task.loss, t.layout.per_proc
        rows = torch.zeros(V, 2, dtype=torch.float64)
        samples = torch.zeros(V, t.layout.accum * t.layout.micro_batch, dtype=torch.float64)
        start = {n: b.detach().clone() for n, b in model.named_buffers()}
        for v in range(V):
            self._swap(self.saved, start)
            total, count, grads, per_sample = 0.0, 0.0, [torch.zeros_like(p) for p in t.params], []
            for batch in self.micro:
                one = {k: x.view(V, -1, *x.shape[1:])[v] for k, x in batch.items()}
                key_samples(model, one.get("index"), self.step)  # the masks this worker's samples had in the step
                out = model(one["input"])
                value = loss(out, one)
                for g, d in zip(grads, torch.autograd.grad(value, t.params, allow_unused=True)):
                    if d is not None:
                        g.add_(d)
                total += float(value.detach())
                count += float(loss.count(one))
                per_sample += _per_sample(loss, out.detach(), one)
            rows[v, 0] = total / count
            rows[v, 1] = float(torch.linalg.vector_norm(torch.stack([torch.linalg.vector_norm(g.double() / count) for g in grads])))
            samples[v, : len(per_sample)] = torch.tensor(per_sample, dtype=torch.float64) if per_sample else 0.0
        return rows, samples

    def report(self) -> dict | None:
        """Steps 2-5; every process must call it (it gathers), rank 0 gets the record."""
        t = self.trainer
        if self.step is None or self.saved_step != self.step:
            return None  # no weights of this step were kept
        live = {n: p.detach().clone() for n, p in self.params.items()}
        live_buffers = {n: b.detach().clone() for n, b in self.buffers.items()}
        try:
            with torch.enable_grad():
                rows, samples = self._worker_rows()
        finally:
            self._swap(live, live_buffers)
        W = t.layout.workers
        rows = t.comm.all_gather(rows.contiguous()).reshape(W, 2)
        samples = t.comm.all_gather(samples.contiguous()).reshape(W, -1)
        index = t.sampler.worker_batches(self.step, range(W))  # [k, W, b]
        losses, norms = rows[:, 0].tolist(), rows[:, 1].tolist()
        outliers = sorted(set(robust_outliers(losses)) | set(robust_outliers(norms)))
        named = []
        for w in outliers:
            ids = index[:, w].reshape(-1).tolist()
            order = sorted(range(len(ids)), key=lambda i: -samples[w, i].item() if math.isfinite(samples[w, i].item()) else -math.inf)
            named.append({"worker": w, "loss": losses[w], "grad_norm": norms[w], "samples": ids,
                          "worst_samples": [{"index": ids[i], "loss": float(samples[w, i])} for i in order[:5]]})
        return {
            "step": self.step,
            "rule": (f"modified z-score (x - median) / (1.4826 MAD) over the {W} workers above {MODIFIED_Z:g} for the "
                     "loss or the gradient norm (Iglewicz and Hoaglin 1993); each worker run alone on the weights "
                     "before the step"),
            "loss": losses,
            "grad_norm": norms,
            "outliers": named,
        }


def _copy_into(copies: dict[str, torch.Tensor], live: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """Copies of `live`; into the copies of the step before when they fit: a fresh copy of a large
    model is memory the kernel backs page by page on every step, several times the copy's own cost."""
    fits = copies.keys() == live.keys() and all(copies[k].shape == t.shape and copies[k].dtype == t.dtype for k, t in live.items())
    if fits:
        if copies:
            torch._foreach_copy_(list(copies.values()), [t.detach() for t in live.values()])
        return copies
    return {k: t.detach().clone() for k, t in live.items()}


def _per_sample(loss, out: torch.Tensor, batch: dict) -> list[float]:
    """Each sample's own loss from the batched forward (its slice of the output and the batch)."""
    try:
        return [float(loss(out[i : i + 1], {k: x[i : i + 1] for k, x in batch.items()})) / max(float(loss.count({k: x[i : i + 1] for k, x in batch.items()})), 1.0)
                for i in range(out.shape[0])]
    except Exception:  # a loss that cannot take one sample: the ranking is left out
        return []
