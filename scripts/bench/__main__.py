"""Benchmarks of the simulator against the physical limit, as interleaved ratios.

    python scripts/bench [--quick] [--only overhead,paths,compress,telemetry,dist,dist-large,memory,startup] [--threads 1] [--out bench.json]

Each comparison runs its cases in alternating blocks after a warm-up and
reports the median per-round ratio with its min–max and interquartile range,
beside the goal. Numbers vary by machine and load; the ratios are what to read.
Results go to a table on stdout and to bench.json in the working directory.
Not a test: nothing here asserts a time.
"""

import argparse
import json
import platform
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # make `bench` importable (also in spawned children)

from bench import dist_large, distributed, memory, overhead, single, startup  # noqa: E402
from bench.common import pin_threads  # noqa: E402
from bench.table import show  # noqa: E402
from bench.timing import use_clock  # noqa: E402

SECTIONS = ("overhead", "paths", "compress", "telemetry", "dist", "dist-large", "memory", "startup")

# Rounds per comparison (full, quick). Loop steps are ~10x slower, so they get fewer.
PLAN = {
    "overhead": ({"rounds": {"LayerNorm MLP": 12, "BatchNorm MLP": 12, "digits CNN": 8, "char transformer": 4}},
                 {"rounds": {"LayerNorm MLP": 5, "BatchNorm MLP": 5, "digits CNN": 3, "char transformer": 2}, "block": 25}),
    "paths": ({"rounds": 30, "loop_rounds": 7}, {"rounds": 10, "loop_rounds": 2}),
    "compress": ({"rounds": 9}, {"rounds": 3}),
    "telemetry": ({"rounds": 9}, {"rounds": 3}),
    "dist": ({"rounds": 40}, {"rounds": 8}),
    "dist-large": ({"rounds": 10, "block": 3}, {"rounds": 4, "block": 2}),
    "memory": ({"sizes": [64, 256, 1024]}, {"sizes": [64, 256], "paths": ("vmap",)}),
    "startup": ({"rounds": 5}, {"rounds": 2}),
}


def run_section(name: str, threads: int, plan: dict) -> list:
    if name == "overhead":
        return overhead.run(**plan)
    if name == "paths":
        return single.paths(**plan)
    if name == "compress":
        return single.compressors(**plan)
    if name == "telemetry":
        return single.telemetry(**plan)
    if name == "dist":
        return distributed.run(threads, **plan)
    if name == "dist-large":
        return dist_large.run(threads, **plan)
    if name == "startup":
        return startup.run(**plan)
    return memory.run(threads, **plan)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="fewer rounds and sizes (about a minute)")
    ap.add_argument("--only", default=",".join(SECTIONS), help=f"comma-separated subset of {', '.join(SECTIONS)}")
    ap.add_argument("--threads", type=int, default=1, help="torch threads in every process")
    ap.add_argument("--clock", choices=("cpu", "wall"), default="cpu",
                    help="clock of one-process comparisons: thread CPU time (steadier on a busy machine) or wall time")
    ap.add_argument("--out", default="bench.json")
    args = ap.parse_args(argv)
    pin_threads(args.threads)
    use_clock(args.clock)
    chosen = [s for s in args.only.split(",") if s]
    unknown = set(chosen) - set(SECTIONS)
    if unknown:
        ap.error(f"unknown section(s) {', '.join(sorted(unknown))}; pick from {', '.join(SECTIONS)}")

    rows, seconds = [], {}
    for name in chosen:
        started = time.perf_counter()
        rows += run_section(name, args.threads, PLAN[name][1 if args.quick else 0])
        seconds[name] = round(time.perf_counter() - started, 1)
        print(f"  {name}: {seconds[name]:.0f} s", file=sys.stderr)

    import torch

    header = f"scaledrill bench ({'quick' if args.quick else 'full'}; {args.threads} thread(s) per process; {args.clock} clock for one process, wall for two; torch {torch.__version__})"
    show(rows, header)
    report = {"quick": args.quick, "threads": args.threads, "clock": args.clock, "torch": torch.__version__, "python": platform.python_version(),
              "machine": platform.machine(), "section_seconds": seconds, "results": [r.to_json() for r in rows]}
    Path(args.out).write_text(json.dumps(report, indent=2))
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
