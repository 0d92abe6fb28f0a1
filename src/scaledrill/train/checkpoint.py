"""Checkpoints: atomic, complete, resumable on another number of processes.

Complete: model parameters and buffers, optimizer state, the step (which fixes the
schedule position and the data position, both pure functions of it), the sync
layer's state (per-worker residuals and low-rank factors), the telemetry's moving
averages and detector windows, and torch's global RNG.

Layout-invariant: per-worker sync state is gathered from every process into rows
for all W workers in global-id order, so a run saved with P processes resumes
with any P that divides W.

Atomic: rank 0 writes `step-NNNNNNN.pt.tmp`, then renames it. Loading uses
`torch.load(weights_only=True)`, which refuses to run code from the file.
"""

import os
from pathlib import Path

import torch

from scaledrill.errors import CheckpointError

FORMAT = "scaledrill-checkpoint-1"

# What a checkpoint fixes: the workers, their micro-batch and the accumulation decide
# which samples each step sees and how optimizer and sync state are laid out per
# worker. How the workers are hosted (layout.procs, layout.backend) may change
# (docs/design.md, "Checkpoints, faults and stopping").
FIXED = ("workers", "micro_batch", "accum")


def _signature(model: torch.nn.Module) -> list[list]:
    return [[name, list(t.shape)] for name, t in model.state_dict().items()]


def _gather_rows(trainer, tensor: torch.Tensor) -> torch.Tensor:
    """[V, ...] rows of this process -> [W, ...] rows of every worker, in global-id order."""
    return trainer.comm.all_gather(tensor.contiguous()).reshape(trainer.layout.workers, *tensor.shape[1:])


def collect(trainer, monitor) -> dict:
    """The checkpoint as a dict of tensors and plain values (every rank must call it)."""
    sync_state = {}
    for key, value in trainer.sync.state_dict().items():
        sync_state[key] = _gather_rows(trainer, value) if key.startswith("worker.") else value
    return {
        "format": FORMAT,
        "step": trainer.step_index,
        "layout": {key: getattr(trainer.layout, key) for key in FIXED},
        "signature": _signature(trainer.model),
        "model": trainer.model.state_dict(),
        "optimizer": trainer.optimizer.state_dict(),
        "optimizer_class": type(trainer.optimizer).__name__,
        "sync": sync_state,
        "monitor": monitor.state_dict() if monitor is not None else None,
        "precision": trainer.precision.state_dict(),  # the loss scale and its streak
        "rng": torch.get_rng_state(),
    }


def save(trainer, monitor, directory: Path) -> Path | None:
    """Write a checkpoint of the current step; returns its path on rank 0."""
    state = collect(trainer, monitor)
    if trainer.comm.rank != 0:
        return None
    directory.mkdir(parents=True, exist_ok=True)
    final = directory / f"step-{trainer.step_index:07d}.pt"
    tmp = final.with_suffix(".pt.tmp")
    torch.save(state, tmp)
    with open(tmp, "rb") as f:
        os.fsync(f.fileno())
    os.replace(tmp, final)
    return final


def find(path: str | Path) -> Path:
    """A checkpoint file, or the newest one in a run directory or its checkpoints/ folder."""
    path = Path(path)
    if path.is_dir():
        folder = path / "checkpoints" if (path / "checkpoints").is_dir() else path
        found = sorted(folder.glob("step-*.pt"))
        if not found:
            raise CheckpointError(f"resume: no checkpoint (step-*.pt) in {folder}")
        return found[-1]
    if not path.exists():
        raise CheckpointError(f"resume: {path} does not exist")
    return path


def load(path: str | Path) -> dict:
    path = find(path)
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:  # truncated, corrupted, or holding objects we refuse to unpickle
        if "weights only" in str(err).lower():
            why = "it holds Python objects beyond tensors and numbers, and loading those could run code"
        else:
            why = f"{type(err).__name__}: {str(err).strip().splitlines()[0] if str(err).strip() else 'unreadable'}"
        raise CheckpointError(f"resume: {path} is not a readable checkpoint ({why})") from None
    if not isinstance(state, dict) or state.get("format") != FORMAT:
        raise CheckpointError(f"resume: {path} is not a scaledrill checkpoint")
    state["path"] = str(path)
    return state


def _restore_optimizer(optimizer, state: dict) -> None:
    """Keep the saved moments, but this run's hyperparameters: a resume with `optim.*`
    overrides (a replay variant) must use them. Another optimizer starts fresh."""
    if state.get("optimizer_class") != type(optimizer).__name__:
        return
    fresh = [{k: v for k, v in group.items() if k != "params"} for group in optimizer.param_groups]
    optimizer.load_state_dict(state["optimizer"])
    for group, settings in zip(optimizer.param_groups, fresh):
        group.update(settings)


def layout_change(state: dict, layout) -> tuple[str, int, int] | None:
    """The first of FIXED where `layout` (a Layout) differs from the checkpoint's: (key, saved, now)."""
    for key in FIXED:
        if state["layout"][key] != getattr(layout, key):
            return key, state["layout"][key], getattr(layout, key)
    return None


def restore(trainer, monitor, state: dict) -> None:
    """Put a loaded checkpoint into a freshly built trainer (and monitor)."""
    where = state.get("path", "checkpoint")
    if state["signature"] != _signature(trainer.model):
        raise CheckpointError(f"resume: {where} holds another model (parameter names or shapes differ from task.model)")
    change = layout_change(state, trainer.layout)
    if change is not None:
        key, saved, now = change
        raise CheckpointError(
            f"resume: {where} was made with layout.{key}={saved}, this run has "
            f"layout.{key}={now}; only layout.procs and layout.backend may change"
        )
    trainer.model.load_state_dict(state["model"])
    _restore_optimizer(trainer.optimizer, state)
    rows = slice(trainer.workers.start, trainer.workers.stop)
    trainer.sync.load_state_dict({k: v[rows] if k.startswith("worker.") else v for k, v in state["sync"].items()})
    if monitor is not None and state.get("monitor") is not None:
        monitor.load_state_dict(state["monitor"])
    if state.get("precision") is not None:  # checkpoints from before mixed precision carry none
        trainer.precision.load_state_dict(state["precision"])
    torch.set_rng_state(state["rng"])
    trainer.step_index = int(state["step"])
