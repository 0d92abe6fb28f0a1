"""MPI collectives through mpi4py, on the tensors' memory without copies.

bf16 has no MPI datatype; such tensors travel as float32 and come back.
"""

import numpy as np
import torch

from scaledrill.dist.base import Done


class _Request:
    def __init__(self, request):
        self.request = request

    def wait(self) -> None:
        self.request.Wait()


class MpiCollective:
    def __init__(self):
        from mpi4py import MPI

        self._mpi = MPI
        self.comm = MPI.COMM_WORLD
        self.rank = self.comm.Get_rank()
        self.size = self.comm.Get_size()

    @staticmethod
    def _view(tensor: torch.Tensor) -> np.ndarray:
        return tensor.detach().numpy()

    def all_reduce(self, tensor: torch.Tensor) -> None:
        if tensor.dtype == torch.bfloat16:
            wide = tensor.float()
            self.all_reduce(wide)
            tensor.copy_(wide)
            return
        if not tensor.is_contiguous():
            buf = tensor.contiguous()
            self.all_reduce(buf)
            tensor.copy_(buf)
            return
        self.comm.Allreduce(self._mpi.IN_PLACE, self._view(tensor), op=self._mpi.SUM)

    def all_reduce_many(self, tensors: list[torch.Tensor]) -> None:
        for tensor in tensors:
            self.all_reduce(tensor)

    def all_reduce_start(self, tensor: torch.Tensor):
        if tensor.dtype == torch.bfloat16 or not tensor.is_contiguous():
            self.all_reduce(tensor)  # needs a copy back after the sum: done now
            return Done()
        return _Request(self.comm.Iallreduce(self._mpi.IN_PLACE, self._view(tensor), op=self._mpi.SUM))

    def all_gather(self, tensor: torch.Tensor) -> torch.Tensor:
        src = tensor.float() if tensor.dtype == torch.bfloat16 else tensor.contiguous()
        out = torch.empty((self.size, *src.shape), dtype=src.dtype)
        self.comm.Allgather(self._view(src), self._view(out))
        return out.to(tensor.dtype)

    def barrier(self) -> None:
        self.comm.Barrier()

    def close(self) -> None:
        pass  # mpi4py finalizes at interpreter exit
