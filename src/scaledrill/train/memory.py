"""Refuse a layout whose step cannot fit in memory, before the step allocates it.

Without this a too-large `layout.micro_batch` allocates until the operating system
refuses, with an allocator traceback (or the out-of-memory killer). The estimate
counts what one optimizer step holds at once in each process, from the layout and
from one sample measured on the real task:

    global-batch index   B · 8 bytes (every process draws the whole global batch's ids)
    micro-batch data     V·b · bytes of one sample
    activations          V·b · 2 · bytes of every module's output for one sample
                         (kept for backward and their gradients: common practice)
    gradients            rows · parameters · element size (V rows on the per-worker
                         paths, one on the fused path)

times P processes, against MemAvailable in /proc/meminfo. An estimate, not a
promise: it guards against the order-of-magnitude mistake, not the last 10 %.
"""

from pathlib import Path

import torch

from scaledrill.errors import ConfigError


def available_bytes() -> int | None:
    """MemAvailable of /proc/meminfo (the kernel's estimate of memory a new workload can use)."""
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _bytes(value) -> int:
    if isinstance(value, torch.Tensor):
        return value.numel() * value.element_size()
    if isinstance(value, dict):
        return sum(_bytes(v) for v in value.values())
    if isinstance(value, (list, tuple)):
        return sum(_bytes(v) for v in value)
    return 0


@torch.no_grad()
def per_sample_bytes(model: torch.nn.Module, train_set, dtype: torch.dtype) -> tuple[int, int]:
    """(data bytes, activation bytes) of one training sample, measured on the model."""
    batch = train_set.take(torch.zeros(1, dtype=torch.long))
    outputs = []
    hooks = [m.register_forward_hook(lambda mod, inp, out: outputs.append(_bytes(out)))
             for m in model.modules() if not list(m.children())]
    was_training = model.training
    model.eval()  # one sample: batch statistics are undefined in training mode
    try:
        x = batch["input"]
        model(x.to(dtype) if x.is_floating_point() else x)
    finally:
        model.train(was_training)
        for hook in hooks:
            hook.remove()
    return _bytes(batch), sum(outputs)


def step_bytes(layout, per_worker_rows: bool, n_params: int, element: int, data: int, activations: int) -> int:
    """Bytes one process holds during one step (see the module docstring)."""
    samples = layout.per_proc * layout.micro_batch
    rows = layout.per_proc if per_worker_rows else 1
    return layout.global_batch * 8 + samples * (data + 2 * activations) + rows * n_params * element


def check_fits(trainer) -> None:
    """ConfigError naming layout.micro_batch when P processes' steps would not fit in memory."""
    available = available_bytes()
    if available is None:
        return
    try:
        data, activations = per_sample_bytes(trainer.model, trainer.task.data.train, trainer.dtype)
    except Exception:  # noqa: BLE001 - the probe is a courtesy: a model the probe cannot run fails in the step, with its own error
        return
    layout = trainer.layout
    n_params = sum(p.numel() for p in trainer.params)
    element = trainer.dtype.itemsize
    need = layout.procs * step_bytes(layout, trainer.path != "fused", n_params, element, data, activations)
    if need > available:
        raise ConfigError(
            "layout.micro_batch",
            f"one step needs about {need:,} bytes ({layout.procs} process(es); {layout.per_proc * layout.micro_batch:,} "
            f"samples of {data + 2 * activations:,} bytes each in a process, plus the global batch's ids and the "
            f"gradients), but {available:,} bytes are available (MemAvailable, /proc/meminfo); shrink layout.micro_batch "
            "or layout.workers, or move samples into layout.accum (an estimate, not a promise)",
            layout.micro_batch,
        )
