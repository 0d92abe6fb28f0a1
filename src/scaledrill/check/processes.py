"""The real-processes path: P operating-system processes over gloo or MPI.

The recipe is laid out on P processes (V = W/P workers each) and started through
the project's launcher, each process running `python -m scaledrill.dist.rank
DIR scaledrill.check.processes:follow_as_rank`. Rank 0 writes DIR/trajectory.pt (the same record as every other path), plus
how far the other ranks' final parameters are from its own.

A user's own step (`check.step`) runs the same way through
`follow_step_as_rank`: each process hosts its V workers as threads running the
user's step (check/threads.py), reducing over all processes.
"""

import os
from pathlib import Path

import torch
from omegaconf import OmegaConf

from scaledrill.check.paths import engine_config, follow
from scaledrill.check.trajectory import Trajectory
from scaledrill.dist.launch import check_backend_available, launch
from scaledrill.errors import ConfigError
from scaledrill.train.engine import Trainer
from scaledrill.train.grads import flatten_params

RESULT = "trajectory.pt"


def process_count(cfg) -> int | None:
    """cfg.layout.procs when it is 2 or more, else the smallest divisor of W above 1 (None when W = 1)."""
    W, P = cfg.layout.workers, cfg.layout.procs
    if P >= 2:
        return P
    return next((p for p in range(2, W + 1) if W % p == 0), None)


def available(backend: str, mpiexec: str | None = None) -> bool:
    try:
        check_backend_available(backend, mpiexec)
        return True
    except ConfigError:
        return False


def run_processes(cfg, backend: str, steps: int, run_dir: Path, step_node=None) -> Trajectory:
    """P processes over `backend`; with `step_node` (check.step) each runs the user's step instead of the engine."""
    procs = process_count(cfg)
    work = run_dir / (f"processes-{backend}" if step_node is None else f"step-processes-{backend}")
    work.mkdir(parents=True, exist_ok=True)
    laid = engine_config(cfg, cfg.train.grads, procs=procs, backend=backend)
    OmegaConf.update(laid, "check.steps", steps, force_add=True)
    if step_node is not None:
        OmegaConf.update(laid, "check.step", step_node, force_add=True)
    job = "follow_as_rank" if step_node is None else "follow_step_as_rank"
    (work / "config.yaml").write_text(OmegaConf.to_yaml(laid, resolve=True))
    (work / RESULT).unlink(missing_ok=True)
    launch(work, backend, procs, address=cfg.layout.address, mpiexec=cfg.layout.mpiexec,
           job=f"scaledrill.check.processes:{job}")  # a free port each time: the check starts several groups
    return Trajectory.from_dict(torch.load(work / RESULT, weights_only=False))  # our own file, written by our ranks


def follow_as_rank(cfg, work: Path, collective) -> None:
    """One rank of the processes path (run by scaledrill.dist.rank): train `check.steps` steps, rank 0 saves the record."""
    try:
        trainer = Trainer(cfg, collective)
        out = follow(trainer, int(cfg.check.steps))
        _save(out, flatten_params(trainer.params).double(), work, collective)
    finally:
        collective.close()


def follow_step_as_rank(cfg, work: Path, collective) -> None:
    """One rank of a user's step in processes: its V workers as threads, `check.steps` steps; rank 0 saves."""
    from scaledrill.check.threads import load_step, run_step_function

    try:
        out, _ = run_step_function(cfg, load_step(cfg.check.step), int(cfg.check.steps),
                                   timeout_s=cfg.train.timeout_s, collective=collective)  # fmt: skip
        _save(out, torch.cat([p.double().reshape(-1) for p in out.params[-1]]), work, collective)
    finally:
        collective.close()


def _save(out: Trajectory, final: torch.Tensor, work: Path, collective) -> None:
    """Rank 0 writes the record, with the largest spread between its workers' and every rank's final parameters."""
    every = collective.all_gather(final)  # [P, n]: do all ranks hold the same parameters?
    out.worker_spread = max(out.worker_spread, float((every - final).abs().max()))
    if collective.rank == 0:
        tmp = work / (RESULT + ".tmp")
        torch.save(out.to_dict(), tmp)
        os.replace(tmp, work / RESULT)
    collective.barrier()
