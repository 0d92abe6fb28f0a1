"""Start the P processes of a run and watch them.

`gloo`: P children of this process, rendezvous on 127.0.0.1 (loopback only,
unless `layout.address` says otherwise) at a free port. `mpi`: this tool re-runs
itself under the `mpiexec` of the mpich wheel. Either way every child runs
`python -m scaledrill.dist.rank RUN_DIR`, which reads RUN_DIR/config.yaml.

When one child fails the others are stopped within `grace_s` seconds instead of
waiting in a collective; the failing rank and its message are reported.
"""

import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

from scaledrill.errors import CheckpointError, ConfigError, DataError, Interrupted, ReportedByRank, WorkerFailed

# A rank that stops on one of these exits with its status: the run fails for the same reason as it would locally.
RANK_STATUSES = {e.exit_code for e in (ConfigError, DataError, CheckpointError)}


def threads_per_proc(procs: int) -> int:
    """Threads each process may use so P processes never oversubscribe the cores."""
    return max(1, (os.cpu_count() or 1) // procs)


def free_port(address: str = "127.0.0.1") -> int:
    with socket.socket() as s:
        s.bind((address, 0))
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


def check_port(address: str, port: int | None) -> None:
    """A port the user chose must be free now, or the rendezvous would fail later and less clearly."""
    if port is None:
        return
    if not isinstance(port, int) or not 0 < port < 65536:
        raise ConfigError("layout.port", "must be a port number from 1 to 65535, or null for a free one", port)
    with socket.socket() as s:
        try:
            s.bind((address, port))
        except OSError as err:
            raise ConfigError("layout.port", f"port {port} on {address} is not free ({err.strerror}); choose another or null", port) from None


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


def error_file(run_dir: Path, rank: int) -> Path:
    return Path(run_dir) / f".rank{rank}.error"


def launch(run_dir: Path, backend: str, procs: int, address: str = "127.0.0.1", grace_s: float = 10.0,
           port: int | None = None, mpiexec: str | None = None, job: str | None = None) -> None:
    """Run the P processes (`python -m scaledrill.dist.rank RUN_DIR JOB`, JOB by default a training run) to completion; raise WorkerFailed naming the rank that failed."""
    env = dict(os.environ, SCALEDRILL_THREADS=str(threads_per_proc(procs)), PYTHONUNBUFFERED="1")
    if backend == "mpi":
        cmd = [find_mpiexec(mpiexec), "-n", str(procs), *_worker_command(run_dir, job)]
        children = {"mpiexec": subprocess.Popen(cmd, env=env)}
    else:
        port = port or free_port(address)
        children = {}
        for rank in range(procs):
            child_env = dict(env, MASTER_ADDR=address, MASTER_PORT=str(port), RANK=str(rank), LOCAL_RANK=str(rank), WORLD_SIZE=str(procs))
            children[rank] = subprocess.Popen(_worker_command(run_dir, job), env=child_env)
    _watch(children, run_dir, procs, grace_s)


def _failure_message(run_dir: Path, rank, code: int, procs: int) -> str:
    """The failing rank's own message, or how it died."""
    ranks = [rank] if isinstance(rank, int) else range(procs)  # under mpiexec any rank may have written
    for r in ranks:
        if error_file(run_dir, r).exists():
            return f"rank {r}: " * (not isinstance(rank, int)) + error_file(run_dir, r).read_text().strip()
    if code < 0:
        return f"the process was killed by signal {-code} ({signal.Signals(-code).name})"
    return f"the process exited with status {code}"


def error_file_written(run_dir: Path, rank, procs: int) -> bool:
    ranks = [rank] if isinstance(rank, int) else range(procs)
    return any(error_file(run_dir, r).exists() for r in ranks)


def _stop(children: dict, grace_s: float) -> None:
    deadline = time.monotonic() + grace_s
    for proc in children.values():
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
    for proc in children.values():
        try:
            proc.wait(max(0.1, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def _watch(children: dict, run_dir: Path, procs: int, grace_s: float) -> None:
    try:
        while True:
            codes = {rank: proc.poll() for rank, proc in children.items()}
            failed = {rank: code for rank, code in codes.items() if code not in (None, 0)}
            if failed:
                rank, code = next(iter(failed.items()))  # the first to fail; the others follow it
                time.sleep(0.2)  # let the failing rank finish writing its message
                _stop(children, grace_s)
                message = _failure_message(run_dir, rank, code, procs)
                if code == Interrupted.exit_code:
                    raise Interrupted(message)
                if code in RANK_STATUSES and error_file_written(run_dir, rank, procs):
                    raise ReportedByRank(f"{message} (rank {rank}; the other processes were stopped)", code)
                if rank == "mpiexec":
                    raise WorkerFailed(f"an MPI rank failed ({message}); mpiexec's report above names it; the other ranks were stopped")
                raise WorkerFailed(f"rank {rank} failed: {message}; the other processes were stopped")
            if all(code == 0 for code in codes.values()):
                return
            time.sleep(0.05)
    except KeyboardInterrupt:
        _stop(children, grace_s)
        raise Interrupted("interrupted; the processes were stopped") from None
