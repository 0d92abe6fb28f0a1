"""A run directory belongs to one run at a time, and a run's results are never mixed with another's.

The claim is an advisory lock (`fcntl.flock`) on RUN_DIR/.lock, held by the
launching process for the run's life; the kernel drops it when that process ends,
however it ends, so a crashed run never leaves the directory blocked. The file
says who holds it (pid, host, start time), for the refusal message.

A directory is refused (ConfigError, exit 2), before anything in it changes, when
- another live run holds its lock;
- it holds a finished run (summary.json);
- it holds an interrupted run (checkpoints but no summary.json) and the new run
  does not continue it with `resume=`: a fresh run would overwrite some of its
  checkpoints and leave others, and `resume=DIR` would then pick the wrong one.
"""

import fcntl
import json
import os
import socket
from datetime import UTC, datetime
from pathlib import Path

from scaledrill.errors import ConfigError

KEY = "hydra.run.dir"
_held: dict[Path, int] = {}  # directory -> descriptor of its locked .lock, for this process's life


def _holder(lock: Path) -> str:
    try:
        who = json.loads(lock.read_text())
        return f"pid {who['pid']} on {who['host']}, started {who['started']}"
    except (OSError, ValueError, KeyError, TypeError):
        return "another process"


def _lock(fd: int, lock: Path) -> None:
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        raise ConfigError(KEY, f"{lock.parent} is in use by another run ({_holder(lock)}); wait for it or choose "
                          "a new directory", str(lock.parent)) from None


def check_contents(run_dir: Path, resuming: bool) -> None:
    """Refuse a directory that holds a finished run, or an interrupted one that this run does not continue."""
    if (run_dir / "summary.json").exists():
        raise ConfigError(KEY, f"{run_dir} already holds a finished run; choose a new directory", str(run_dir))
    saved = sorted((run_dir / "checkpoints").glob("step-*.pt"))
    if saved and not resuming:
        raise ConfigError(KEY, f"{run_dir} holds an interrupted run (newest checkpoint {saved[-1].name}); continue "
                          f"it with resume={run_dir / 'checkpoints'} or choose a new directory", str(run_dir))


def claim(run_dir: Path, resuming: bool) -> None:
    """Lock `run_dir` for this process, or raise ConfigError; idempotent within one process."""
    run_dir = Path(run_dir).resolve()
    if run_dir in _held:
        return
    lock = run_dir / ".lock"
    fd = os.open(lock, os.O_RDWR) if lock.exists() else None  # an existing lock file is only read here
    if fd is not None:
        _lock(fd, lock)
    try:
        check_contents(run_dir, resuming)
    except ConfigError:
        if fd is not None:
            os.close(fd)
        raise
    if fd is None:
        run_dir.mkdir(parents=True, exist_ok=True)
        fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        _lock(fd, lock)
        try:
            check_contents(run_dir, resuming)  # again, under the lock: a run may have finished meanwhile
        except ConfigError:
            os.close(fd)
            raise
    started = datetime.now(UTC).isoformat(timespec="seconds")
    os.ftruncate(fd, 0)
    os.pwrite(fd, json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "started": started}).encode(), 0)
    _held[run_dir] = fd


def release(run_dir: Path) -> None:
    fd = _held.pop(Path(run_dir).resolve(), None)
    if fd is not None:
        os.close(fd)  # closing the descriptor drops the lock


def run_dir_from_argv(argv: list[str]) -> Path | None:
    """The run directory an override on the command line fixes (`hydra.run.dir=...`), without interpolations."""
    for arg in argv:
        key, _, value = arg.partition("=")
        if key.lstrip("+") == KEY and value and "${" not in value:
            return Path(value.strip("'\""))
    return None


def resuming_from_argv(argv: list[str]) -> bool:
    return any(arg.partition("=")[0].lstrip("+") == "resume" and arg.partition("=")[2] not in ("", "null") for arg in argv)
