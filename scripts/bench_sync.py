"""Benchmark the sync layer; writes bench_sync.json. Not a test: numbers vary by machine.

1. Bucketed all-reduce vs one raw torch.distributed.all_reduce of the same bytes,
   2 gloo processes, interleaved A,B,A,B after warm-up; median throughput ratio
   (raw time / layer time, goal >= 0.9) with its interquartile spread.
2. Each compressor's step time relative to exact, W = 8 on one process (goal:
   topk and powersgd <= 1.5).

Usage: python scripts/bench_sync.py [--floats 2000000] [--repeats 15] [--threads 1]
"""

import argparse
import json
import os
import socket
import statistics
import time
from datetime import timedelta

import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from scaledrill.backends import LocalCollective
from scaledrill.layout import Layout
from scaledrill.sync import build_sync

SHAPES = [torch.Size(s) for s in ([1024, 512], [1024], [512, 1024], [512], [256, 512], [256], [10, 256], [10])]


def quartiles(xs):
    q = statistics.quantiles(xs, n=4)
    return {"median": statistics.median(xs), "q1": q[0], "q3": q[2]}


def _allreduce_child(rank, port, floats, repeats, threads, bucket_mib, out):
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE="2")
    torch.set_num_threads(threads)
    from scaledrill.backends.gloo import GlooCollective

    coll = GlooCollective(timedelta(seconds=120))
    layout = Layout(2, 2, 1, 1, "gloo")
    cfg = {"name": "exact", "fidelity": False, "bucket_mib": bucket_mib}
    sync = build_sync(cfg, layout, [torch.Size([floats])], coll, seed=0)
    local = torch.randn(1, floats)
    raw = local[0].clone()

    def layer():
        sync.reduce(local, layout.worker_ids(rank), 0)

    def plain():
        dist.all_reduce(raw)

    times = {"layer": [], "raw": []}
    for i in range(3 + repeats):  # 3 warm-up rounds
        for name, fn in (("layer", layer), ("raw", plain)):
            dist.barrier()
            t = time.perf_counter()
            fn()
            if i >= 3:
                times[name].append(time.perf_counter() - t)
    if rank == 0:
        ratios = [r / a for a, r in zip(times["layer"], times["raw"])]
        mb = floats * 4 / 1e6
        json.dump({"floats": floats, "bucket_mib": bucket_mib, "ratio": quartiles(ratios),
                   "layer_MBps": mb / statistics.median(times["layer"]),
                   "raw_MBps": mb / statistics.median(times["raw"])}, open(out, "w"))
    dist.barrier()
    coll.close()


def bench_allreduce(floats, repeats, threads, bucket_mib, tmp):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    mp.spawn(_allreduce_child, args=(port, floats, repeats, threads, bucket_mib, tmp), nprocs=2)
    return json.load(open(tmp))


def bench_compressors(repeats):
    W = 8
    layout = Layout(W, 1, 1, 1, "local")
    n = sum(s.numel() for s in SHAPES)
    grads = torch.randn(W, n)
    configs = {
        "exact": {"name": "exact"},
        "fp16": {"name": "fp16"},
        "bf16": {"name": "bf16"},
        "topk": {"name": "topk", "fraction": 0.01, "error_feedback": True},
        "randk": {"name": "randk", "fraction": 0.01},
        "sign": {"name": "sign", "error_feedback": True},
        "qsgd": {"name": "qsgd", "levels": 16},
        "powersgd": {"name": "powersgd", "rank": 2, "error_feedback": True},
    }
    times = {}
    for name, cfg in configs.items():
        sync = build_sync({**cfg, "fidelity": False}, layout, SHAPES, LocalCollective(), seed=0)
        ts = []
        for i in range(2 + repeats):
            t = time.perf_counter()
            sync.reduce(grads, range(W), i)  # per-worker rows for every method, exact included
            if i >= 2:
                ts.append(time.perf_counter() - t)
        times[name] = statistics.median(ts)
    return {"W": W, "n": n, "seconds": times, "relative_to_exact": {k: v / times["exact"] for k, v in times.items()}}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--floats", type=int, default=2_000_000)
    ap.add_argument("--repeats", type=int, default=15)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--out", default="bench_sync.json")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    results = {"threads": args.threads, "allreduce": []}
    for mib in (25.0, 1.0):
        r = bench_allreduce(args.floats, args.repeats, args.threads, mib, args.out + ".part")
        results["allreduce"].append(r)
        q = r["ratio"]
        print(f"bucketed ({mib:g} MiB) vs raw all-reduce of {args.floats} floats: throughput ratio "
              f"median {q['median']:.3f} [IQR {q['q1']:.3f}-{q['q3']:.3f}]  (goal >= 0.9)")
    os.remove(args.out + ".part")
    comp = bench_compressors(args.repeats)
    results["compressors"] = comp
    print(f"\nper-step time, W={comp['W']} workers, n={comp['n']} floats, one process")
    print(f"{'method':<10}{'ms':>10}{'x exact':>10}")
    for name, sec in comp["seconds"].items():
        print(f"{name:<10}{sec * 1e3:>10.2f}{comp['relative_to_exact'][name]:>10.2f}")
    print("goal: topk and powersgd <= 1.5 x exact")
    json.dump(results, open(args.out, "w"), indent=2)


if __name__ == "__main__":
    main()
