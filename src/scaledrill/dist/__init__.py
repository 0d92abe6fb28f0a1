"""Collectives across the P processes of a run.

Three implementations of one small protocol: `local` (one process, no
communication), `gloo` (torch.distributed) and `mpi` (mpi4py). Reductions are
sums; the sync layer divides by W once.
"""

from datetime import timedelta

from scaledrill.dist.base import Collective, LocalCollective

__all__ = ["Collective", "LocalCollective", "open_collective"]


def open_collective(backend: str, timeout_s: float = 60.0) -> Collective:
    """Join the process group this process was started in.

    The launcher (or torchrun, or mpiexec) sets the environment; a process started
    by hand with no such environment gets the one-process collective.
    """
    if backend == "local":
        return LocalCollective()
    if backend == "gloo":
        from scaledrill.dist.gloo import GlooCollective

        return GlooCollective(timedelta(seconds=timeout_s))
    if backend == "mpi":
        from scaledrill.dist.mpi import MpiCollective

        return MpiCollective()
    raise ValueError(f"unknown backend {backend!r}")
