"""torch.distributed collectives (gloo on CPU; the same code takes NCCL on GPUs).

Rendezvous: MASTER_ADDR, MASTER_PORT, RANK and WORLD_SIZE come from our launcher
or from torchrun. Our launcher serves the rendezvous store itself, on the address
it was given (dist/launch.py), so every rank here is the store's client; under
torchrun, rank 0 serves it (`env://`). The timeout bounds how long a collective waits
for a peer that died, so a fault ends the run instead of hanging it.
"""

import os
from datetime import timedelta

import torch
import torch.distributed as dist


class GlooCollective:
    def __init__(self, timeout: timedelta):
        if not dist.is_initialized():
            if os.environ.get("SCALEDRILL_STORE") == "served":
                env = os.environ
                store = dist.TCPStore(env["MASTER_ADDR"], int(env["MASTER_PORT"]), None, False, timeout)
                dist.init_process_group("gloo", store=store, rank=int(env["RANK"]), world_size=int(env["WORLD_SIZE"]), timeout=timeout)
            else:
                dist.init_process_group("gloo", init_method="env://", timeout=timeout)
        self.rank = dist.get_rank()
        self.size = dist.get_world_size()

    def all_reduce(self, tensor: torch.Tensor) -> None:
        dist.all_reduce(tensor)

    def all_reduce_many(self, tensors: list[torch.Tensor]) -> None:
        for work in [dist.all_reduce(t, async_op=True) for t in tensors]:  # all in flight, then wait
            work.wait()

    def all_reduce_start(self, tensor: torch.Tensor):
        return dist.all_reduce(tensor, async_op=True)

    def all_gather(self, tensor: torch.Tensor) -> torch.Tensor:
        out = torch.empty((self.size, *tensor.shape), dtype=tensor.dtype)
        dist.all_gather(list(out.unbind(0)), tensor.contiguous())
        return out

    def barrier(self) -> None:
        dist.barrier()

    def close(self) -> None:
        if dist.is_initialized():
            dist.destroy_process_group()
