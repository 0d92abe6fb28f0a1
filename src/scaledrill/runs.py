"""`scaledrill run`: validate, lay out the processes, train, write the run directory.

The run directory (Hydra's output dir) gets `config.yaml` (the resolved config
every process reads) and, from rank 0, `summary.json`. A directory that already
holds a finished run is never overwritten.
"""

import json
import os
from pathlib import Path

from omegaconf import OmegaConf

from .backends import open_collective
from .backends.base import running_under_launcher
from .backends.launch import check_backend_available, check_port, launch
from .errors import ConfigError
from .progress import StepProgress
from .validate import validate_run


def write_json(path: Path, payload: dict) -> None:
    """Write then rename, so a reader never sees half a file."""
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(json.dumps(payload, indent=2, default=float) + "\n")
    os.replace(tmp, path)


def prepare_run_dir(run_dir: Path, cfg) -> None:
    if (run_dir / "summary.json").exists():
        raise ConfigError("hydra.run.dir", f"{run_dir} already holds a finished run; choose a new directory", str(run_dir))
    run_dir.mkdir(parents=True, exist_ok=True)
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


def run_as_rank(cfg, run_dir: Path, collective) -> dict:
    """Train as one process of the run (rank 0 writes the outputs)."""
    from .engine import run_training

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


def outcome(summary: dict, run_dir: Path) -> str:
    """The lines a user reads when a run ends: how it went, and where to look next."""
    steps, seconds = summary["steps"], summary["wall_seconds"]
    if summary["diverged"]:
        head = f"diverged after {steps} steps ({summary['stop_reason']})"
    elif summary["stopped_early"]:
        head = f"stopped early after {steps} steps ({seconds:.1f} s): the goal was met"
    else:
        head = f"finished {steps} steps in {seconds:.1f} s"
    facts = []
    if summary.get("final_loss") is not None:
        facts.append(f"last train loss {summary['final_loss']:.4g}")
    facts += [f"test {k} {v:.4g}" for k, v in summary.get("eval", {}).items()]
    if summary.get("noise_scale") is not None:
        facts.append(f"gradient noise scale ~{summary['noise_scale']:.0f} samples (B={summary['global_batch']})")
    lines = [head + (": " + ", ".join(facts) if facts else "")]
    lines += [f"incident report: {path}" for path in summary.get("incidents", [])]
    lines.append(f"outputs: {run_dir} (summary.json, run.sqlite{', checkpoints/' if summary.get('last_checkpoint') else ''})")
    lines.append(f"look: scaledrill report {run_dir}")
    if summary["diverged"]:
        lines.append(_replay_hint(run_dir, steps))
    return "\n".join(lines)


def run_verb(cfg, run_dir: Path) -> dict | None:
    cfg = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    layout = validate_run(cfg)
    if running_under_launcher():  # torchrun or mpiexec started us: we are one rank
        collective = open_collective(layout.backend, cfg.train.timeout_s)
        if collective.rank == 0:
            prepare_run_dir(run_dir, cfg)
        collective.barrier()
        return run_as_rank(cfg, run_dir, collective)
    check_process_count(layout.procs)
    where = cfg.layout
    check_backend_available(layout.backend, where.get("mpiexec"))
    if layout.backend == "gloo":
        check_port(where.get("address", "127.0.0.1"), where.get("port"))
    prepare_run_dir(run_dir, cfg)
    print(layout.describe())
    if layout.backend == "local":
        return run_as_rank(cfg, run_dir, open_collective("local"))
    launch(run_dir, layout.backend, layout.procs, address=where.get("address", "127.0.0.1"), port=where.get("port"),
           mpiexec=where.get("mpiexec"))
    return json.loads((run_dir / "summary.json").read_text())


def _replay_hint(run_dir: Path, steps: int) -> str:
    """Fixes need a checkpoint from before the blow-up; replay finds the newest one in the run directory."""
    if len(list((run_dir / "checkpoints").glob("step-*.pt"))) < 2:
        return (f"to try fixes, rerun with train.checkpoint_every={max(1, steps // 10)} and replay from a "
                "checkpoint before the blow-up (README, replay)")
    return (f"try fixes side by side: scaledrill replay replay.from={run_dir} "
            "'+replay.variants.sqrt=\"scaling.rule=sqrt\"' (README, replay)")


def run_command(cfg, run_dir: Path) -> dict | None:
    """`scaledrill run` itself: the run, then its outcome (from rank 0 only under a launcher)."""
    from .worker import rank_from_env

    summary = run_verb(cfg, run_dir)
    if summary is not None and rank_from_env() == 0:
        print(outcome(summary, run_dir))
    return summary
