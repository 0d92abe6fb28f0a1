"""What the kernel says about a run's processes: which are alive, and where they listen (/proc, Linux)."""

import ipaddress
import os
import subprocess
import sys
import time
from pathlib import Path

from conftest import ROOT

LISTEN = "0A"  # TCP_LISTEN in /proc/net/tcp's `st` column (include/net/tcp_states.h)


def start(*args: str, env: dict | None = None) -> subprocess.Popen:
    """`scaledrill run ARGS` in a session of its own, as a terminal would start it."""
    full_env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1", **(env or {}))
    return subprocess.Popen([sys.executable, "-m", "scaledrill.cli", "run", *args], cwd=ROOT, env=full_env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)


def wait_for(pattern: Path, proc: subprocess.Popen | None = None, limit: float = 180.0) -> Path:
    deadline = time.monotonic() + limit
    while True:
        found = sorted(pattern.parent.glob(pattern.name))
        if found:
            return found[0]
        assert proc is None or proc.poll() is None, f"the run ended before {pattern}: {proc.communicate()}"
        assert time.monotonic() < deadline, f"nothing matched {pattern}"
        time.sleep(0.1)


def processes_of(run_dir: Path) -> list[int]:
    """Live processes whose command line names `run_dir` (launcher, mpiexec, ranks)."""
    out = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit() and int(entry.name) != os.getpid():
            try:
                cmdline = (entry / "cmdline").read_bytes()
                state = (entry / "stat").read_text().rsplit(")", 1)[1].split()[0]
            except OSError:
                continue
            if str(run_dir).encode() in cmdline and state != "Z":
                out.append(int(entry.name))
    return out


def rank_worker(run_dir: Path, rank: int) -> int | None:
    """The process that trains rank `rank` (under MPI, the child of the rank's guard)."""
    candidates = {}
    for pid in processes_of(run_dir):
        try:
            environ = Path(f"/proc/{pid}/environ").read_bytes().split(b"\0")
            parent = int(Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[1])
        except OSError:
            continue
        if b"scaledrill.dist.rank" in Path(f"/proc/{pid}/cmdline").read_bytes() and (
                f"PMI_RANK={rank}".encode() in environ or f"RANK={rank}".encode() in environ):
            candidates[pid] = parent
    workers = [pid for pid, parent in candidates.items() if parent in candidates] or list(candidates)
    return workers[0] if workers else None


def _socket_inodes(pid: int) -> set[str]:
    inodes = set()
    try:
        for fd in Path(f"/proc/{pid}/fd").iterdir():
            try:
                target = os.readlink(fd)
            except OSError:
                continue
            if target.startswith("socket:["):
                inodes.add(target[8:-1])
    except OSError:
        pass
    return inodes


def _address(hex_addr: str) -> ipaddress.IPv4Address | ipaddress.IPv6Address:
    raw = bytes.fromhex(hex_addr)
    if len(raw) == 4:
        return ipaddress.IPv4Address(raw[::-1])  # one little-endian 32-bit word
    words = b"".join(raw[i:i + 4][::-1] for i in range(0, 16, 4))  # four such words
    return ipaddress.IPv6Address(words)


def listening(pids: list[int]) -> list[tuple[str, int]]:
    """(address, port) of every TCP socket in LISTEN state held by one of `pids`."""
    mine = set().union(*(_socket_inodes(pid) for pid in pids)) if pids else set()
    found = []
    for table in ("tcp", "tcp6"):
        for line in Path(f"/proc/net/{table}").read_text().splitlines()[1:]:
            fields = line.split()
            local, state, inode = fields[1], fields[3], fields[9]
            if state == LISTEN and inode in mine:
                host, port = local.split(":")
                found.append((str(_address(host)), int(port, 16)))
    return found


def on_loopback(address: str) -> bool:
    ip = ipaddress.ip_address(address)
    if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
        ip = ip.ipv4_mapped
    return ip.is_loopback
