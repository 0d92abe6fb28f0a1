"""`scaledrill run`: validate, lay out the processes, train, write the run directory.

The run directory (Hydra's output dir) gets `config.yaml` (the resolved config
every process reads) and, from rank 0, `summary.json`. A directory that already
holds a finished run is never overwritten.
"""

import json
import os
from pathlib import Path

from omegaconf import OmegaConf

from scaledrill.config.validate import validate_run
from scaledrill.dist import open_collective
from scaledrill.dist.base import running_under_launcher
from scaledrill.dist.launch import check_backend_available, check_port, launch, resolve_address
from scaledrill.errors import ConfigError
from scaledrill.io import write_json
from scaledrill.train.progress import StepProgress
from scaledrill.train.rundir import claim


def prepare_run_dir(run_dir: Path, cfg) -> None:
    """Claim the directory for this run (train/rundir.py: locked, not finished, not another run's checkpoints)."""
    claim(run_dir, resuming=bool(cfg.get("resume")))
    (run_dir / "config.yaml").write_text(OmegaConf.to_yaml(cfg, resolve=True))


PROCS_PER_CORE = 16  # beyond this, processes on one machine mostly wait for a core


def check_process_count(procs: int) -> None:
    """Processes are for rehearsing the collectives; workers are for the arithmetic."""
    cores = os.cpu_count() or 1
    if procs > PROCS_PER_CORE * cores:
        raise ConfigError(
            "layout.procs",
            f"{procs} processes on {cores} cores would spend their time waiting for a core; at most "
            f"{PROCS_PER_CORE * cores} here — host more virtual workers per process instead",
            procs,
        )


def train_as_rank(cfg, run_dir: Path, collective) -> dict:
    """Train as one process of the run (rank 0 writes the outputs)."""
    from scaledrill.train.engine import run_training

    progress = StepProgress(cfg, enabled=collective.rank == 0 and cfg.train.progress)
    try:
        with progress:
            summary = run_training(cfg, collective, run_dir=run_dir, on_step=progress.update)
        collective.barrier()  # no rank tears down its connections while a peer still uses them
    finally:
        collective.close()
    if collective.rank == 0:
        write_json(run_dir / "summary.json", summary)
    return summary


def run_verb(cfg, run_dir: Path) -> dict | None:
    cfg = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    layout = validate_run(cfg)
    if running_under_launcher():  # torchrun or mpiexec started us: we are one rank
        collective = open_collective(layout.backend, cfg.train.timeout_s)
        if collective.rank == 0:
            prepare_run_dir(run_dir, cfg)
        collective.barrier()
        return train_as_rank(cfg, run_dir, collective)
    check_process_count(layout.procs)
    where = cfg.layout
    check_backend_available(layout.backend, where.get("mpiexec"))
    if layout.backend != "local":
        resolve_address(where.address)  # a name that resolves to nothing: refused now, not in a rank
    if layout.backend == "gloo":
        check_port(where.address, where.port)
    prepare_run_dir(run_dir, cfg)
    print(layout.describe())
    if layout.backend == "local":
        return train_as_rank(cfg, run_dir, open_collective("local"))
    launch(run_dir, layout.backend, layout.procs, address=where.address, port=where.port,
           mpiexec=where.get("mpiexec"), timeout_s=cfg.train.timeout_s)
    return json.loads((run_dir / "summary.json").read_text())
