"""The one entry point of every process of a multi-process job: `python -m scaledrill.dist.rank DIR JOB`.

DIR holds the config.yaml the launcher wrote; JOB names the function that does
this rank's work, as `module:function` taking `(cfg, DIR, collective)` (a training
run: `scaledrill.train.run:train_as_rank`; the check's processes path:
`scaledrill.check.processes:follow_as_rank`). The job is looked up by name so that
this low layer never imports the layers above it.

The rank joins the process group, runs the job and exits 0. A failure is written
to DIR/.rankR.error (the status and the message, as JSON) so the launcher can say
which rank failed and why, and the exit status is the error's own (2 bad input,
3 data, 4 checkpoint, 130/143 a signal, …).

Under mpiexec the launcher is not the ranks' parent and cannot learn how one
died, so each MPI rank forks: the parent (the rank's guard) forwards SIGINT and
SIGTERM to the child that does the work and, when the child is killed by a signal
(SIGKILL, the out-of-memory killer, a crash), writes that to the error file.
"""

import importlib
import json
import os
import signal
import sys
import traceback
from pathlib import Path

from scaledrill.errors import Interrupted, ScaledrillError

TRAIN_JOB = "scaledrill.train.run:train_as_rank"


def rank_from_env() -> int:
    for key in ("RANK", "PMI_RANK", "OMPI_COMM_WORLD_RANK"):
        if key in os.environ:
            return int(os.environ[key])
    return 0


def error_file(run_dir: Path, rank: int) -> Path:
    return Path(run_dir) / f".rank{rank}.error"


def write_error(run_dir: Path, rank: int, status: int, message: str) -> None:
    """Atomically, so the launcher never reads half a report."""
    path = error_file(run_dir, rank)
    tmp = path.with_suffix(".error.tmp")
    tmp.write_text(json.dumps({"status": status, "message": message}))
    os.replace(tmp, path)


def read_error(run_dir: Path, rank: int) -> tuple[int, str] | None:
    """(status, message) a rank reported, or None."""
    try:
        report = json.loads(error_file(run_dir, rank).read_text())
        return int(report["status"]), str(report["message"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def describe_status(status: int) -> str:
    """How a process ended, from its wait status as Popen gives it (negative: a signal)."""
    if status < 0:
        return f"killed by signal {-status} ({signal.Signals(-status).name})"
    return f"exited with status {status}"


def resolve_job(name: str):
    module, function = name.split(":")
    return getattr(importlib.import_module(module), function)


def _stop_before_training(signum, frame):
    # replaced by the training loop's own handler (train/signals.py) once steps run
    raise Interrupted("stopped by a signal before training began; nothing to resume from yet", signum)


def _guard(child: int, run_dir: Path, rank: int) -> int:
    """The MPI rank's parent: forward stop signals, report a death by signal, exit as the child did."""
    from scaledrill.dist.procs import send

    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda signum, frame: send(child, signum))  # the child may be gone already
    while True:
        try:
            _, wait_status = os.waitpid(child, 0)
            break
        except InterruptedError:
            continue
    status = os.waitstatus_to_exitcode(wait_status)
    if status < 0:
        if read_error(run_dir, rank) is None:
            write_error(run_dir, rank, 128 - status, describe_status(status))
        return 128 - status
    return status


def run_job(run_dir: Path, job: str, rank: int) -> int:
    import torch
    from omegaconf import OmegaConf

    from scaledrill.dist import open_collective

    cfg = OmegaConf.load(run_dir / "config.yaml")
    torch.set_num_threads(int(os.environ.get("SCALEDRILL_THREADS", "1")))
    try:
        resolve_job(job)(cfg, run_dir, open_collective(cfg.layout.backend, cfg.train.timeout_s))
        return 0
    except ScaledrillError as err:
        write_error(run_dir, rank, err.exit_code, str(err))
        return err.exit_code
    except Exception as err:  # report, not hide: the launcher prints it with the rank
        write_error(run_dir, rank, 1, f"{type(err).__name__}: {err}")
        if cfg.get("debug"):
            traceback.print_exc()
        return 1


def main(argv: list[str]) -> int:
    from scaledrill.dist.procs import die_with_parent

    run_dir, job = Path(argv[0]), argv[1] if len(argv) > 1 else TRAIN_JOB
    rank = rank_from_env()
    die_with_parent()  # a launcher (or guard) that dies takes its ranks with it, after their checkpoint
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, _stop_before_training)
    try:
        if "PMI_RANK" in os.environ:
            child = os.fork()
            if child:
                return _guard(child, run_dir, rank)
            die_with_parent()
        return run_job(run_dir, job, rank)
    except Interrupted as err:
        write_error(run_dir, rank, err.exit_code, str(err))
        return err.exit_code
    finally:
        for sig in (signal.SIGINT, signal.SIGTERM):
            signal.signal(sig, signal.SIG_DFL)  # the work is over: a signal now just ends the process


if __name__ == "__main__":
    code = main(sys.argv[1:])
    sys.stdout.flush()
    sys.stderr.flush()
    # Every output is written and closed by now. Skipping the interpreter's teardown avoids a
    # rare abort ("terminate called without an active exception") of gloo's threads being
    # destroyed during finalisation on a heavily loaded machine, which turned a finished run
    # into a failed one.
    os._exit(code)
