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
import time
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


def rank_processes(run_dir) -> list[int]:
    """Every live rank-entry process of the run in `run_dir`, wherever it hangs in the tree: a rank
    whose guard died first is re-parented to init, out of reach of a walk from the launcher."""
    wanted = [RANK_ENTRY, str(run_dir).encode()]
    out = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit() and int(entry.name) != os.getpid():
            try:
                argv = (entry / "cmdline").read_bytes().split(b"\0")
            except OSError:
                continue
            if RANK_ENTRY in argv and wanted[1] in argv and _alive(int(entry.name)):
                out.append(int(entry.name))
    return out


def send(pid: int, sig: int) -> None:
    try:
        os.kill(pid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def kill_tree(root: int) -> list[int]:
    """SIGKILL `root` and everything below it (children first, so none is re-parented and missed); the pids hit."""
    hit = descendants(root)
    for pid in reversed(hit):
        send(pid, signal.SIGKILL)
    send(root, signal.SIGKILL)
    return [*hit, root]


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


def wait_gone(pids: list[int], timeout_s: float = 10.0) -> None:
    """Wait until none of `pids` runs any more: a SIGKILL is only a request, and a process
    that is not our child cannot be waited for."""
    deadline = time.monotonic() + timeout_s
    while any(_alive(pid) for pid in pids) and time.monotonic() < deadline:
        time.sleep(0.02)


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
