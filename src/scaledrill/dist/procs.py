"""The processes of a run as the kernel sees them, read from /proc (Linux).

The launcher needs the pid of every rank to forward a signal or to end the run,
but under mpiexec the ranks are its grandchildren (and hydra puts each in a
session of its own, so a process-group kill misses them). They are found by
walking the tree below the launcher's child and reading each process's
environment for the rank the process manager gave it.
"""

import ctypes
import os
import signal
from pathlib import Path

RANK_ENTRY = b"scaledrill.dist.rank"
PR_SET_PDEATHSIG = 1  # linux/prctl.h


def _parent(pid: int) -> int | None:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return int(stat.rsplit(")", 1)[1].split()[1])  # the name may hold spaces and ')'


def descendants(root: int) -> list[int]:
    """Every live process below `root`, parents before their children."""
    children: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            parent = _parent(int(entry.name))
            if parent is not None:
                children.setdefault(parent, []).append(int(entry.name))
    found, todo = [], [root]
    while todo:
        for child in children.get(todo.pop(), []):
            found.append(child)
            todo.append(child)
    return found


def _environ_rank(pid: int) -> int | None:
    try:
        if RANK_ENTRY not in Path(f"/proc/{pid}/cmdline").read_bytes():
            return None
        environ = Path(f"/proc/{pid}/environ").read_bytes().split(b"\0")
    except OSError:
        return None
    for key in (b"PMI_RANK=", b"RANK="):
        for entry in environ:
            if entry.startswith(key):
                return int(entry[len(key):])
    return None


def rank_pids(root: int) -> dict[int, int]:
    """rank -> pid of the topmost rank-entry process of that rank below `root` (the rank's guard under MPI)."""
    out: dict[int, int] = {}
    for pid in descendants(root):  # parents come first, so the guard wins over the rank it forked
        rank = _environ_rank(pid)
        if rank is not None and rank not in out:
            out[rank] = pid
    return out


def send(pid: int, sig: int) -> None:
    try:
        os.kill(pid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def kill_tree(root: int) -> None:
    """SIGKILL `root` and everything below it (children first, so none is re-parented and missed)."""
    for pid in reversed(descendants(root)):
        send(pid, signal.SIGKILL)
    send(root, signal.SIGKILL)


def die_with_parent(sig: int = signal.SIGTERM) -> None:
    """Ask the kernel to send `sig` to this process when its parent dies: a launcher killed
    with SIGKILL then still stops its ranks (they checkpoint on SIGTERM)."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, int(sig), 0, 0, 0)
    except (OSError, AttributeError):
        return
    if os.getppid() == 1:  # the parent died before the request took effect
        os.kill(os.getpid(), sig)
