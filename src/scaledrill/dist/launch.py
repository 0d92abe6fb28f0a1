"""Start the P processes of a run and watch them.

`gloo`: P children of this process. The rendezvous store is served from this
process, on a socket it binds itself (127.0.0.1 unless `layout.address` says
otherwise; a port taken by another run is refused before any rank starts), and
the ranks' gloo connections use the loopback interface. `mpi`: the ranks are
started by the `mpiexec` of the mpich wheel; on one machine its forking process
manager (`mpiexec.gforker`, beside it), which opens no network listener, and the
ranks' transport is held to the loopback device. Either way every rank runs
`python -m scaledrill.dist.rank RUN_DIR JOB`, which reads RUN_DIR/config.yaml.

The watcher:
- forwards SIGINT and SIGTERM to every rank, which all stop after the same step,
  checkpoint, and report the `resume=` command, shown here; a second signal kills;
- when one rank fails (an error, a signal, a crash) stops the others at once
  (SIGTERM, then SIGKILL after `grace_s` seconds: a rank blocked in a collective
  with the failed one cannot act on a signal) instead of letting them wait, and
  ends the run with that rank's own status and message (2 bad input, 3 data,
  4 checkpoint, 5 a rank that died), the same as the local backend would.
"""

import ipaddress
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

from scaledrill.dist.procs import kill_tree, rank_pids, rank_processes, send, wait_gone
from scaledrill.dist.rank import describe_status, error_file, read_error
from scaledrill.errors import INTERRUPT_STATUSES, ConfigError, Interrupted, WorkerFailed, error_for_status


def threads_per_proc(procs: int) -> int:
    """Threads each process may use so P processes never oversubscribe the cores."""
    return max(1, (os.cpu_count() or 1) // procs)


def resolve_address(address) -> str:
    """The IP address `layout.address` names (a host name is looked up once, here)."""
    try:
        return socket.getaddrinfo(str(address), None, socket.AF_INET, socket.SOCK_STREAM)[0][4][0]
    except (socket.gaierror, UnicodeError, ValueError):
        raise ConfigError("layout.address", "must be an IPv4 address or a host name this machine can resolve "
                          "(127.0.0.1 keeps every connection on this machine)", address) from None


def is_loopback(address: str) -> bool:
    return ipaddress.ip_address(resolve_address(address)).is_loopback


def free_port(address: str = "127.0.0.1") -> int:
    with socket.socket() as s:
        s.bind((resolve_address(address), 0))
        return s.getsockname()[1]


def find_mpiexec(given: str | None = None) -> str:
    if given:
        if not (Path(given).is_file() and os.access(given, os.X_OK)):
            raise ConfigError("layout.mpiexec", "must be the path of an executable mpiexec", given)
        return given
    beside = Path(sys.executable).parent / "mpiexec"
    found = str(beside) if beside.exists() else shutil.which("mpiexec")
    if not found:
        raise ConfigError("layout.backend", "mpi needs an `mpiexec`; install the mpich wheel (pip install mpich) or use gloo", "mpi")
    return found


def listen(address: str, port: int | None) -> socket.socket:
    """The rendezvous socket, bound and listening: claiming the port is one atomic step, so of two
    runs started together on one `layout.port` the second gets a clean refusal. `port` has passed config/rules.py."""
    host = resolve_address(address)
    sock = socket.socket()
    try:
        sock.bind((host, port or 0))
        sock.listen(128)
    except OSError as err:
        sock.close()
        raise ConfigError("layout.port", f"port {port} on {host} is not free ({err.strerror}); choose another or null", port) from None
    return sock


def check_port(address: str, port: int | None) -> None:
    """A port the user chose must be free now, or the rendezvous would fail later and less clearly."""
    if port is not None:
        listen(address, port).close()


def check_backend_available(backend: str, mpiexec: str | None = None) -> None:
    """Fail before anything starts when the backend's library is missing."""
    if backend == "mpi":
        try:
            import mpi4py  # noqa: F401
        except ImportError:
            raise ConfigError("layout.backend", "mpi needs the mpi4py package (pip install mpi4py mpich)", backend) from None
        find_mpiexec(mpiexec)
    if backend == "gloo":
        import torch.distributed as dist

        if not dist.is_available() or not dist.is_gloo_available():
            raise ConfigError("layout.backend", "this torch build has no gloo support", backend)


def _worker_command(run_dir: Path, job: str | None) -> list[str]:
    return [sys.executable, "-m", "scaledrill.dist.rank", str(run_dir), *([job] if job else [])]


LOOPBACK_TRANSPORT = {  # keep the ranks' own connections on the loopback device
    "GLOO_SOCKET_IFNAME": "lo",  # gloo's pairs
    "UCX_NET_DEVICES": "lo",  # mpich's ucx netmod
    "FI_TCP_IFACE": "lo",  # mpich's ofi netmod (tcp provider)
}


class Gloo:
    """P children of this process; the rendezvous store is served from here."""

    def __init__(self, run_dir: Path, procs: int, env: dict, address: str, port: int | None, timeout_s: float, job: str | None):
        from datetime import timedelta

        import torch.distributed as dist

        self.sock = listen(address, port)
        host, port = self.sock.getsockname()[:2]
        self.store = dist.TCPStore(host, port, None, True, timedelta(seconds=timeout_s), wait_for_workers=False,
                                   master_listen_fd=self.sock.fileno())
        self.procs = {}
        for rank in range(procs):
            child_env = dict(env, MASTER_ADDR=host, MASTER_PORT=str(port), RANK=str(rank), LOCAL_RANK=str(rank),
                             WORLD_SIZE=str(procs), SCALEDRILL_STORE="served")
            self.procs[rank] = subprocess.Popen(_worker_command(run_dir, job), env=child_env, start_new_session=True)

    def ranks(self) -> dict[int, int]:
        return {rank: proc.pid for rank, proc in self.procs.items() if proc.poll() is None}

    def statuses(self) -> dict:
        return {rank: proc.poll() for rank, proc in self.procs.items()}

    def wait(self, limit: float) -> None:
        deadline = time.monotonic() + limit
        for proc in self.procs.values():
            try:
                proc.wait(max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                pass

    def kill(self) -> None:
        for proc in self.procs.values():
            if proc.poll() is None:
                proc.kill()
            proc.wait()
        self.sock.close()


class Mpi:
    """`mpiexec -n P`: the ranks are its descendants, found through /proc."""

    def __init__(self, run_dir: Path, procs: int, env: dict, address: str, mpiexec: str | None, job: str | None):
        path = find_mpiexec(mpiexec)
        forking = Path(path).parent / "mpiexec.gforker"
        if is_loopback(address) and forking.exists():
            path = str(forking)  # one machine: fork the ranks, no proxy daemon listening on every interface
        self.expected, self.run_dir = procs, Path(run_dir)
        self.proc = subprocess.Popen([path, "-n", str(procs), *_worker_command(run_dir, job)], env=env, start_new_session=True)
        self.known: dict[int, int] = {}

    def ranks(self) -> dict[int, int]:
        if len(self.known) < self.expected and self.proc.poll() is None:
            self.known.update(rank_pids(self.proc.pid))
        return {rank: pid for rank, pid in self.known.items() if Path(f"/proc/{pid}").exists()}

    def statuses(self) -> dict:
        return {"mpiexec": self.proc.poll()}

    def wait(self, limit: float) -> None:
        try:
            self.proc.wait(limit)
        except subprocess.TimeoutExpired:
            pass

    def kill(self) -> None:
        hit = kill_tree(self.proc.pid) if self.proc.poll() is None else []
        for pid in rank_processes(self.run_dir):  # hydra gives each rank a session of its own, and a
            send(pid, signal.SIGKILL)  # rank whose guard died first hangs below init
            hit.append(pid)
        self.proc.wait()
        wait_gone(hit)  # none of them outlives the launcher's return


def clear_reports(run_dir: Path) -> None:
    """Reports of an earlier run in this directory must not be taken for this run's."""
    for path in Path(run_dir).glob(".rank*.error*"):
        path.unlink(missing_ok=True)


def launch(run_dir: Path, backend: str, procs: int, address: str = "127.0.0.1", grace_s: float = 1.0,
           port: int | None = None, mpiexec: str | None = None, job: str | None = None, timeout_s: float = 60.0) -> None:
    """Run the P processes (`python -m scaledrill.dist.rank RUN_DIR JOB`, JOB by default a training run) to
    completion; raise the failing rank's own error, or WorkerFailed naming a rank that died."""
    clear_reports(run_dir)
    env = dict(os.environ, SCALEDRILL_THREADS=str(threads_per_proc(procs)), PYTHONUNBUFFERED="1")
    if is_loopback(address):
        env.update(LOOPBACK_TRANSPORT)
    if backend == "mpi":
        group = Mpi(run_dir, procs, env, address, mpiexec, job)
    else:
        group = Gloo(run_dir, procs, env, address, port, timeout_s, job)
    try:
        _watch(group, Path(run_dir), procs, grace_s)
    finally:
        group.kill()  # nothing outlives the launcher


def _reports(run_dir: Path, procs: int) -> dict[int, tuple[int, str]]:
    return {rank: report for rank in range(procs) if (report := read_error(run_dir, rank)) is not None}


def _first_stop(run_dir: Path, procs: int) -> tuple[int, int, str] | None:
    """(rank, status, message) of the first rank that reported stopping on a signal."""
    stops = sorted((rank, *r) for rank, r in _reports(run_dir, procs).items() if r[0] in INTERRUPT_STATUSES)
    return stops[0] if stops else None


def _cause(group, run_dir: Path, procs: int) -> tuple | None:
    """(rank, status, message) of the failure that ended the run, or None while all is well.

    When one rank dies its peers fail too (a closed connection, a timeout), so the cause
    is chosen by kind, not by who reported first: a rank killed by a signal or gone
    without a word, then a rank's bad input, data or checkpoint, then the earliest report."""
    def collect():
        reports = {rank: r for rank, r in _reports(run_dir, procs).items() if r[0] not in INTERRUPT_STATUSES}
        ended = {rank: code for rank, code in group.statuses().items()
                 if code not in (None, 0) and code not in INTERRUPT_STATUSES and rank not in reports}
        return reports, ended

    reports, ended = collect()
    if not reports and not ended:
        return None
    time.sleep(0.3)  # the rest of the story: the failed rank's own report, a dead peer's status
    reports, ended = collect()
    ranked = [(0, 0.0, rank, code, describe_status(code)) for rank, code in ended.items()]
    for rank, (status, message) in reports.items():
        kind = 0 if status > 128 else 1 if status in (2, 3, 4) else 2
        ranked.append((kind, error_file(run_dir, rank).stat().st_mtime, rank, status, message))
    return min(ranked, key=lambda c: c[:2])[2:]


def _raise_failure(rank, status: int, message: str) -> None:
    if status in (2, 3, 4):  # bad input, data or checkpoint: the same error, status and words as on one process
        raise error_for_status(status, message)
    who = "an MPI process (mpiexec)" if rank == "mpiexec" else f"rank {rank}"
    raise WorkerFailed(f"{who} failed: {message}; the other processes were stopped")


def _watch(group, run_dir: Path, procs: int, grace_s: float) -> None:
    caught: list[int] = []
    told: set[int] = set()  # pids the stop signal was forwarded to

    def tell_ranks() -> None:
        for pid in group.ranks().values():
            if pid not in told:
                told.add(pid)
                send(pid, caught[0])

    def forward(signum, frame):
        if caught:  # asked twice: stop now
            raise Interrupted("stopped at once by a second signal; the newest checkpoint may be older", signum)
        caught.append(signum)
        tell_ranks()

    previous = {}
    if threading.current_thread() is threading.main_thread():  # only there may Python handle signals
        previous = {sig: signal.signal(sig, forward) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        while True:
            failure = _cause(group, run_dir, procs)
            if failure is not None:
                for pid in group.ranks().values():
                    send(pid, signal.SIGTERM)
                group.wait(grace_s)
                _raise_failure(*failure)  # `finally` kills what is left (checkpoints are written atomically)
            if all(code is not None for code in group.statuses().values()):
                break
            if caught:
                tell_ranks()  # also a rank that started after the signal came
            time.sleep(0.05)
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    stopped = _first_stop(run_dir, procs)
    if stopped is not None:
        raise Interrupted(stopped[2], caught[0] if caught else stopped[1] - 128)
