"""The collective protocol and the one-process implementation."""

import os
from typing import Protocol

import torch


class Collective(Protocol):
    rank: int
    size: int

    def all_reduce(self, tensor: torch.Tensor) -> None:
        """Sum `tensor` in place over all processes."""

    def all_reduce_many(self, tensors: list[torch.Tensor]) -> None:
        """Sum each tensor in place over all processes; the backend may overlap them."""

    def all_reduce_start(self, tensor: torch.Tensor) -> "Pending":
        """Begin summing `tensor` in place; it holds the sum once `.wait()` returns.
        Every process must start and wait in the same order as its other collectives."""

    def all_gather(self, tensor: torch.Tensor) -> torch.Tensor:
        """Stack every process's `tensor` (same shape everywhere) along a new dim 0, in rank order."""

    def barrier(self) -> None: ...

    def close(self) -> None: ...


class Pending(Protocol):
    def wait(self) -> object: ...


class Done:
    """A collective that already finished (one process, or a backend that blocks)."""

    def wait(self) -> None:
        pass


class LocalCollective:
    """One process: every collective is the identity."""

    rank = 0
    size = 1

    def all_reduce(self, tensor: torch.Tensor) -> None:
        pass

    def all_reduce_many(self, tensors: list[torch.Tensor]) -> None:
        pass

    def all_reduce_start(self, tensor: torch.Tensor) -> Done:
        return Done()

    def all_gather(self, tensor: torch.Tensor) -> torch.Tensor:
        return tensor.unsqueeze(0).clone()

    def barrier(self) -> None:
        pass

    def close(self) -> None:
        pass


def running_under_launcher() -> bool:
    """True inside a process started by torchrun, mpiexec or our own launcher."""
    return "WORLD_SIZE" in os.environ or "PMI_SIZE" in os.environ or "OMPI_COMM_WORLD_SIZE" in os.environ
