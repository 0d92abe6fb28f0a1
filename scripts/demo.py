"""The whole rehearsal in a few minutes on two cores (what `make demo` runs).

1. check    — accumulation, virtual workers and real processes match the true batch
2. ladder   — the digits recipe at growing global batches, with SGD and with LAMB
3. forecast — time and cost of a described real job (a 302M-parameter transformer, counted on the
               meta device) on an example cluster of our own invention, against its 8-device baseline
4. diverge  — a recipe scaled too far blows up; replay tries fixes from its last healthy checkpoint
5. report   — one HTML page with every picture

Every step is the command line a user would type; the outputs land in one folder.
"""

import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SCALEDRILL = [sys.executable, "-m", "scaledrill.cli"]

LADDER = [
    "task=digits", "layout.micro_batch=16", "ladder.batches=[32,64,128,256,512]",
    "ladder.target.metric=accuracy", "ladder.target.value=0.9", "ladder.target.mode=above",
    "ladder.max_steps=300", "ladder.check_every=10", "scaling=sqrt", "scaling.base_batch=32",
]


def step(title: str, *args: str) -> None:
    print(f"\n=== {title}\n$ scaledrill {' '.join(args)}", flush=True)
    started = time.perf_counter()
    done = subprocess.run([*SCALEDRILL, *args], cwd=ROOT)
    print(f"({time.perf_counter() - started:.0f} s)", flush=True)
    if done.returncode not in (0, 1):  # 1 from `check` means a path differs: worth a look, not a stop
        sys.exit(done.returncode)


def main() -> None:
    out = ROOT / "runs" / f"demo-{time.strftime('%Y%m%d-%H%M%S')}"
    step("1. check: do accumulation, virtual workers and processes give the true large-batch gradient?",
         "check", "task=digits", "layout.workers=8", "layout.procs=2", "layout.backend=gloo", "layout.micro_batch=8", "layout.accum=2",
         f"hydra.run.dir={out}/check")
    step("2a. ladder with SGD + momentum (square-root lr scaling)",
         "ladder", *LADDER, "optim=sgd", "optim.lr=0.05", f"hydra.run.dir={out}/ladder-sgd")
    step("2b. ladder with LAMB (layer-wise trust ratio)",
         "ladder", *LADDER, "optim=lamb", "optim.lr=0.005", f"hydra.run.dir={out}/ladder-lamb")
    step("3. forecast: one epoch of 4M sequences for a 302M-parameter transformer, from 8 devices at batch 256 to 256 devices",
         "forecast", "+forecast/model=transformer", "job.dataset_size=4000000", "job.epochs=1",
         "job.baseline.batch=256", "job.baseline.devices=8", "batches=[256,1024,4096]", f"hydra.run.dir={out}/forecast")
    step("4a. a recipe scaled 64x by the linear rule diverges (detectors stop it, an incident is written)",
         "run", "+recipe=divergence", "train.progress=false", f"hydra.run.dir={out}/blowup")
    step("4b. replay: the same steps again, and fixes side by side, from the newest checkpoint before the blow-up",
         "replay", f"replay.from={out}/blowup", '+replay.variants.clip="optim.clip_norm=2.0"', '+replay.variants.sqrt="scaling.rule=sqrt"',
         '+replay.variants.lamb=["optim=lamb","optim.lr=0.002","scaling.rule=sqrt"]', f"hydra.run.dir={out}/replay")
    step("5. report", "report", str(out))
    print(f"\nDemo outputs: {out}\nOpen the report: {out / 'report.html'}")


if __name__ == "__main__":
    main()
