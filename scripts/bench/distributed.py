"""Two gloo processes: the engine against torch's DistributedDataParallel, and the
sync layer's bucketed all-reduce against one raw all-reduce of the same bytes.

Both comparisons share one pair of processes (one rendezvous, one start-up).
Before every timed block both ranks meet at a barrier, so both time the same case
at once; rank 0's times are reported (a step ends in an all-reduce, so the ranks
finish together).
"""

import copy
import json
import os
import tempfile
import time
from pathlib import Path

import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from scaledrill.dist.launch import free_port
from scaledrill.sync.settings import SyncConfig

from .common import MICRO, WORKERS, pin_threads, batch_fetch, trainer
from .timing import Row, interleave, ms, ratios

PROCS = 2
DEFAULT_KIB = float(SyncConfig.bucket_kib)



def ddp_step(tr):
    """torch DDP on this rank's share of the engine's first global batch.

    DDP averages gradients over ranks, so each rank's loss is its sum over B/P:
    the mean over ranks then equals the gradient of the global mean loss.
    """
    from torch.nn.parallel import DistributedDataParallel

    model = DistributedDataParallel(copy.deepcopy(tr.model))
    node = tr.cfg.optim
    opt = torch.optim.SGD(model.parameters(), lr=tr.recipe.lr_at(0), momentum=node.get("momentum", 0.0))
    fetch = batch_fetch(tr)
    loss, share = tr.task.loss, tr.layout.global_batch / PROCS

    def step():
        batch = fetch()
        opt.zero_grad(set_to_none=True)
        (loss(model(batch["input"]), batch) / share).backward()
        opt.step()

    return step


def engine_vs_ddp(collective, rounds: int) -> dict:
    tr = trainer(f"layout.procs={PROCS}", "layout.backend=gloo", "train.grads=fused", collective=collective)
    times = interleave({"engine": tr.step, "ddp": ddp_step(tr)}, rounds, block=10, warmup=5, sync=dist.barrier, clock=time.perf_counter)
    return {"ratio": ratios(times, "engine", "ddp"), "engine_ms": ms(times["engine"]), "ddp_ms": ms(times["ddp"])}


def allreduce(collective, floats: int, bucket_kib: float, rounds: int) -> dict:
    """The sync layer's exact reduce (bucketed, input donated as the engine does) vs one dist.all_reduce of the same flat vector."""
    from scaledrill.layout import Layout
    from scaledrill.sync import build_sync

    layout = Layout(PROCS, PROCS, 1, 1, "gloo")
    sync = build_sync({"name": "exact", "fidelity": False, "bucket_kib": bucket_kib}, layout, [torch.Size([floats])], collective, seed=0)
    local, raw = torch.randn(1, floats), torch.randn(floats)
    workers = layout.worker_ids(collective.rank)
    cases = {"layer": lambda: sync.reduce(local, workers, 0, donate=True), "raw": lambda: dist.all_reduce(raw)}
    times = interleave(cases, rounds, block=10, warmup=5, sync=dist.barrier, clock=time.perf_counter)
    mb = floats * 4 / 1e6
    return {"floats": floats, "bucket_kib": bucket_kib, "throughput": ratios(times, "raw", "layer"),
            "layer_MBps": mb / (ms(times["layer"]) / 1e3), "raw_MBps": mb / (ms(times["raw"]) / 1e3)}


def _child(rank: int, port: int, threads: int, rounds: int, floats: int, out: str) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE=str(PROCS))
    pin_threads(threads)
    from scaledrill.dist import open_collective

    collective = open_collective("gloo", timeout_s=300)
    try:
        result = {"ddp": engine_vs_ddp(collective, rounds),
                  "allreduce": [allreduce(collective, floats, kib, rounds) for kib in (DEFAULT_KIB, 1024.0)]}
        if rank == 0:
            Path(out).write_text(json.dumps(result))
        dist.barrier()
    finally:
        collective.close()


def run(threads: int, rounds: int, floats: int = 2_000_000) -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        out = str(Path(tmp) / "dist.json")
        mp.spawn(_child, args=(free_port(), threads, rounds, floats, out), nprocs=PROCS)
        result = json.loads(Path(out).read_text())
    d = result["ddp"]
    rows = [Row("engine (2 gloo procs) / torch DDP (2 gloo procs)", d["ratio"]["median"], d["ratio"], "<= 1.10",
                note=f"W={WORKERS}, b={MICRO}, fused; engine {d['engine_ms']:.1f} ms, DDP {d['ddp_ms']:.1f} ms", detail=d)]
    for a in result["allreduce"]:
        default = a["bucket_kib"] == DEFAULT_KIB  # the goal holds at the default; smaller buckets are shown for their cost
        rows.append(Row(f"bucketed all-reduce throughput / raw ({a['bucket_kib'] / 1024:g} MiB buckets)", a["throughput"]["median"],
                        a["throughput"], ">= 0.9" if default else None,
                        note=f"{a['floats'] * 4 / 1e6:.0f} MB; {a['layer_MBps']:.0f} vs {a['raw_MBps']:.0f} MB/s"
                        + ("" if a["bucket_kib"] * 2**10 >= a["floats"] * 4 else f"; {-(-a['floats'] * 4 // int(a['bucket_kib'] * 2**10))} "
                           "calls: small buckets pay gloo's per-call latency"), detail=a))
    return rows
