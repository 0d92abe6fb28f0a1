"""The whole rehearsal in a few minutes on two cores (what `make demo` runs).

1. check    — accumulation, virtual workers and real processes match the true batch
2. ladder   — the digits recipe at growing global batches, with SGD and with LAMB
3. forecast — time and cost of a described real job (a 302M-parameter transformer, counted on the
               meta device) on an example cluster of our own invention, against its 8-device baseline
4. diverge  — a recipe scaled too far blows up; replay tries fixes from its last healthy checkpoint,
               over the log of an invented cluster job that ran the same recipe
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
    "ladder.goal.metric=accuracy", "ladder.goal.value=0.9", "ladder.goal.reached_when=above",
    "ladder.max_steps=300", "ladder.check_every=10", "scaling=sqrt", "scaling.base_batch=32",
]


def step(title: str, *args: str) -> None:
    print(f"\n=== {title}\n$ scaledrill {' '.join(args)}", flush=True)
    started = time.perf_counter()
    done = subprocess.run([*SCALEDRILL, *args], cwd=ROOT)
    print(f"({time.perf_counter() - started:.0f} s)", flush=True)
    if done.returncode not in (0, 1):  # 1 from `check` means a path differs: worth a look, not a stop
        sys.exit(done.returncode)


def invent_cluster_log(blowup: Path, path: Path, departs: int = 21) -> None:
    """An invented scenario, for the replay's overlay: a cluster job ran the same recipe and logged
    step, loss, grad_norm, lr and throughput as CSV. Its losses agree with the rehearsal up to
    float rounding (another summation order: a relative 1e-6 wobble) until step `departs`, where
    (invented) a corrupted shard reached its workers and its loss climbs 30% more each step."""
    sys.path.insert(0, str(ROOT / "src"))
    from scaledrill.telemetry.store import read_scalars

    scalars = read_scalars(blowup / "run.sqlite")
    steps, loss = scalars["loss"]
    grad, lr = scalars["grad_norm"][1], scalars["lr"][1]
    rows = ["step,loss,grad_norm,lr,samples_per_s"]
    for i, s in enumerate(steps.tolist()):
        wobble = 1 + 1e-6 * (-1) ** s
        climb = 1.3 ** max(0, s - departs + 1)
        rows.append(f"{s},{loss[i] * wobble * climb:.9g},{grad[i] * wobble * climb:.9g},{lr[i]:.9g},{52000 + 37 * (s % 7)}")
    path.write_text("\n".join(rows) + "\n")


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
         "run", "+scenario=divergence", "train.progress=false", f"hydra.run.dir={out}/blowup")
    invent_cluster_log(out / "blowup", out / "cluster-job.csv")
    step("4b. replay: the same steps again, and fixes side by side, from the newest checkpoint before the blow-up, "
         "over the (invented) cluster job's log",
         "replay", f"replay.from={out}/blowup", f"replay.cluster_log={out}/cluster-job.csv", '+replay.variants.clip="optim.clip_norm=2.0"', '+replay.variants.sqrt="scaling.rule=sqrt"',
         '+replay.variants.lamb=["optim=lamb","optim.lr=0.002","scaling.rule=sqrt"]', f"hydra.run.dir={out}/replay")
    step("5. report", "report", str(out))
    print(f"\nDemo outputs: {out}\nOpen the report: {out / 'report.html'}")


if __name__ == "__main__":
    main()
