"""Collectives across the P processes of a run.

Three implementations of one small protocol: `local` (one process, no
communication), `gloo` (torch.distributed) and `mpi` (mpi4py). Reductions are
sums; the sync layer divides by W once.
"""

from .base import Collective, LocalCollective, open_collective

__all__ = ["Collective", "LocalCollective", "open_collective"]
