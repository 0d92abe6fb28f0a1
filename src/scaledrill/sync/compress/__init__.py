"""The compressor protocol and the registry that picks one by name.

A compressor is a small init/update pair with its state in a dataclass, in the
manner of optax's gradient transformations. `update` sees the rows of this
process's workers at once, because some methods (PowerSGD) need a collective in
the middle of compressing; it gets those collectives from the `Round`.

The simulator reduces *decompressed* values with a dense all-reduce: the average
is the one a real cluster would compute, while `Out.wire_bytes` counts what one
worker would really send in the compressed format (values, indices, scales).
"""

from dataclasses import dataclass, field
from typing import Any, Callable, Protocol

import torch

from scaledrill.sync.compress.seeds import mix, mix_rows


@dataclass
class Empty:
    """State of a compressor that keeps none."""


class Stateless:
    """Base of the per-worker lossy methods that carry nothing from step to step."""

    per_worker = True
    lossless = False

    def init(self, shapes, V, seed, dtype):
        return Empty()


_SCRATCH: list[torch.Generator] = []  # Round.generators' reusable generators


@dataclass
class Round:
    """What one step's compression may use.

    `sum` adds rows [V, m] over this process and then over all processes, in the
    rows' dtype; `mean` is the global average over all `world` workers. Both return
    [m], identical on every process. When `donated`, the rows handed to `update`
    are the caller's to overwrite, and `mean(rows, in_place=True)` may reuse them.
    """

    step: int
    workers: range  # global ids of the rows handed to `update`
    world: int  # W
    seed: int
    sum: Callable[[torch.Tensor], torch.Tensor]
    mean: Callable[..., torch.Tensor]
    donated: bool = False

    def generator(self, v: int) -> torch.Generator:
        """Random stream of row v, from (seed, step, global worker id) only, so never from P."""
        return torch.Generator().manual_seed(mix(self.seed, self.step, self.workers[v]))

    def generators(self) -> list[torch.Generator]:
        """The streams of `generator(v)` for every row v, seeds hashed in one pass (seeds.py).

        They are scratch generators shared by all callers in the process, reseeded here
        (cheaper than new ones): use them before the next call."""
        seeds = mix_rows((self.seed, self.step), self.workers)
        _SCRATCH.extend(torch.Generator() for _ in range(len(seeds) - len(_SCRATCH)))
        return [gen.manual_seed(s) for gen, s in zip(_SCRATCH, seeds)]



@dataclass
class Out:
    mean: torch.Tensor  # [m] average over all workers of the decompressed values
    sent: torch.Tensor  # [V, m] what each local worker contributed, decompressed
    wire_bytes: float  # what one worker sends this step
    stats: dict[str, float] = field(default_factory=dict)


class Compressor(Protocol):
    per_worker: bool  # needs each worker's own gradient (else a per-process sum will do)
    lossless: bool  # the average equals the exact one

    def init(self, shapes: list[torch.Size], V: int, seed: int, dtype: torch.dtype) -> Any: ...

    def update(self, x: torch.Tensor, state: Any, rnd: Round) -> tuple[Out, Any]: ...


def dense_bytes(n: int, dtype: torch.dtype) -> int:
    return n * dtype.itemsize


def build(cfg) -> Compressor:
    """The compressor named by `cfg.name`, configured from the other keys of `cfg`."""
    from scaledrill.sync.compress.cast import Cast
    from scaledrill.sync.compress.exact import Exact
    from scaledrill.sync.compress.powersgd import PowerSGD
    from scaledrill.sync.compress.qsgd import QSGD
    from scaledrill.sync.compress.randk import RandK
    from scaledrill.sync.compress.sign import ScaledSign
    from scaledrill.sync.compress.topk import TopK
    from scaledrill.sync.settings import settings_of

    makers = {
        "exact": lambda c: Exact(),
        "fp16": lambda c: Cast(Exact(), torch.float16),
        "bf16": lambda c: Cast(Exact(), torch.bfloat16),
        "topk": lambda c: TopK(fraction=c.fraction, count=c.count),
        "randk": lambda c: RandK(fraction=c.fraction, count=c.count, unbiased=c.unbiased),
        "sign": lambda c: ScaledSign(),
        "qsgd": lambda c: QSGD(levels=c.levels),
        "powersgd": lambda c: PowerSGD(rank=c.rank, exact_until=c.exact_until, min_saving=c.min_saving),
    }
    cfg = settings_of(cfg)  # the keys not given take their compressor's defaults
    return makers[cfg.name](cfg)


NAMES = ("exact", "fp16", "bf16", "topk", "randk", "sign", "qsgd", "powersgd")
