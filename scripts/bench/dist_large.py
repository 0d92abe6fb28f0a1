"""Two gloo processes on a model of ten million parameters: the engine against
torch's DistributedDataParallel, where communication is a real share of a step.

The model is the stock `MLP` of the teacher task (11 hidden layers of 1024, about
10.5M parameters, 42 MB of float32 gradient), on W=4 workers of b=8 (B=32, 16
samples per process), SGD with momentum, `sync=exact`, the fused path, layer and
noise-scale statistics off (as in the `dist` section). Every record goes through
the telemetry monitor (detectors, no run store), as in a run; blame stays on, as by
default (the monitor's detectors tell it before each update whether to copy the
parameters for a per-worker rerun: on a healthy run, never); a third case turns it
off, to show what is left of its share. Data come from `FixedTeacher`, so taking a batch
is an index gather on both sides. Both ranks meet at a barrier before every timed
block; rank 0's wall times are reported (a step ends in an all-reduce, so the
ranks finish together).
"""

import json
import os
import tempfile
import time
from pathlib import Path

import torch.distributed as dist
import torch.multiprocessing as mp

from .common import pin_threads, trainer
from .distributed import PROCS, ddp_step, free_port
from .single import observed
from .timing import Row, interleave, ms, ratios

WORKERS, MICRO = 4, 8
MODEL = ("task=teacher", "task.model.hidden=1024", "task.model.depth=11", "task.data._target_=bench.models.FixedTeacher",
         "optim.lr=0.01")  # a small rate: the timed steps repeat, and a diverging run would time NaNs


def _child(rank: int, port: int, threads: int, rounds: int, block: int, out: str) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE=str(PROCS))
    pin_threads(threads)
    from scaledrill.dist import open_collective
    from scaledrill.telemetry.monitor import Monitor

    collective = open_collective("gloo", timeout_s=300)
    try:
        def build(*extra):
            return trainer(*MODEL, f"layout.procs={PROCS}", "layout.backend=gloo", "train.grads=fused", *extra,
                           workers=WORKERS, micro=MICRO, collective=collective)

        tr, bare = build(), build("telemetry.blame=false")
        monitors = [Monitor(t.cfg, None, rank, MICRO, WORKERS * MICRO, "") for t in (tr, bare)]
        cases = {"engine": observed(tr, monitors[0]), "no_blame": observed(bare, monitors[1]), "ddp": ddp_step(tr)}
        times = interleave(cases, rounds, block=block, warmup=2, sync=dist.barrier, clock=time.perf_counter)
        if rank == 0:
            result = {"ratio": ratios(times, "engine", "ddp"), "no_blame": ratios(times, "no_blame", "ddp"),
                      "ms": {k: ms(v) for k, v in times.items()}, "params": tr.grads.numel}
            Path(out).write_text(json.dumps(result))
        dist.barrier()
    finally:
        collective.close()


def run(threads: int, rounds: int, block: int) -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        out = str(Path(tmp) / "dist_large.json")
        mp.spawn(_child, args=(free_port(), threads, rounds, block, out), nprocs=PROCS)
        d = json.loads(Path(out).read_text())
    took = d["ms"]
    setting = f"{d['params']:,} params, W={WORKERS}, b={MICRO}, fused, exact, layer and noise statistics off"
    return [Row("engine (2 gloo procs) / torch DDP (2 gloo procs), 10M-param MLP", d["ratio"]["median"], d["ratio"], "<= 1.00",
                note=f"{setting}; engine {took['engine']:.1f} ms, DDP {took['ddp']:.1f} ms", detail=d),
            Row("  the same without blame (telemetry.blame=false) / DDP", d["no_blame"]["median"], d["no_blame"],
                note=f"{took['no_blame']:.1f} ms")]
