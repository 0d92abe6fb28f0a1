"""Peak memory of a step as the number of simulated workers grows.

Each measurement runs in a fresh process, so nothing freed by an earlier run
hides in the allocator. Steps:
1. build the trainer (digits model, W workers of b samples, the chosen path);
2. reset the kernel's peak-RSS mark (/proc/self/clear_refs, "5") and read RSS;
3. run a few steps (the first compiles the vmap call);
4. peak RSS minus the RSS of step 2 is what the steps needed on top of the model
   and the data.
A straight-line fit over W splits that into a fixed part and a part per worker;
the per-worker part is compared with the floor of holding |θ| floats per worker
(the [W, |θ|] gradient rows), and 8 GiB divided by it gives the largest W.

The digits training set has 1437 samples, so W·b above that would not fit one
global batch; `TiledDigits` repeats the set to let W grow (memory, not learning,
is measured here).
"""

import multiprocessing as mp
import re
from pathlib import Path

from .common import MICRO, pin_threads, trainer
from .timing import Row

GIB = 2**30
BUDGET = 8 * GIB


def _status(field: str) -> int:
    """A field of /proc/self/status (VmRSS, VmHWM) in bytes."""
    text = Path("/proc/self/status").read_text()
    return int(re.search(rf"^{field}:\s+(\d+) kB", text, re.M).group(1)) * 1024


def _reset_peak() -> None:
    Path("/proc/self/clear_refs").write_text("5")


class TiledDigits:
    """The digits data with its training set repeated `repeat` times (test set unchanged)."""

    def __init__(self, repeat: int = 1, **kwargs):
        import torch

        from scaledrill.tasks.digits import DigitsData, TensorSet

        base = DigitsData(**kwargs)
        self.train = TensorSet({k: torch.cat([v] * repeat) for k, v in base.train.tensors.items()})
        self.test, self.classes = base.test, base.classes


def _measure(path: str, workers: int, steps: int, threads: int, queue) -> None:
    pin_threads(threads)
    import gc

    repeat = -(-workers * MICRO // 1437)
    tr = trainer(f"train.grads={path}", "task.data._target_=bench.memory.TiledDigits", f"+task.data.repeat={repeat}",
                 workers=workers)  # 1.
    gc.collect()
    _reset_peak()  # 2.
    before = _status("VmRSS")
    for _ in range(steps):  # 3.
        tr.step()
    queue.put({"path": path, "workers": workers, "before": before, "peak": _status("VmHWM"), "step_bytes": _status("VmHWM") - before,
               "params": tr.grads.numel, "itemsize": tr.params[0].element_size()})


def measure(path: str, workers: int, steps: int, threads: int) -> dict:
    """Run `_measure` in a fresh process and return its numbers."""
    ctx = mp.get_context("spawn")
    queue = ctx.Queue()
    proc = ctx.Process(target=_measure, args=(path, workers, steps, threads, queue))
    proc.start()
    result = queue.get(timeout=600)
    proc.join()
    return result


def fit(points: list[dict], key: str) -> tuple[float, float]:
    """Least-squares line points[key] = fixed + per_worker · W."""
    xs, ys = [p["workers"] for p in points], [p[key] for p in points]
    mx, my = sum(xs) / len(xs), sum(ys) / len(ys)
    slope = sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sum((x - mx) ** 2 for x in xs)
    return my - slope * mx, slope


def run(threads: int, sizes: list[int], paths: tuple[str, ...] = ("vmap", "fused"), steps: int = 3) -> list[Row]:
    rows = []
    for path in paths:
        points = [measure(path, w, steps, threads) for w in sizes]
        fixed, per_worker = fit(points, "step_bytes")
        base, total_per_worker = fit(points, "peak")  # the whole process, data set included
        floor = points[0]["params"] * points[0]["itemsize"]
        largest = int((BUDGET - base) // total_per_worker)
        detail = {"points": points, "fixed_bytes": fixed, "per_worker_bytes": per_worker, "floor_bytes_per_worker": floor,
                  "process_base_bytes": base, "process_per_worker_bytes": total_per_worker}
        rows.append(Row(f"peak step memory per worker ({path})", per_worker / 1024, None, None, unit="KiB",
                        note=f"floor |θ|·4 B = {floor / 1024:.1f} KiB (x{per_worker / floor:.0f}); fixed {fixed / 2**20:.0f} MiB; "
                             f"fit over W={sizes}", detail=detail))
        rows.append(Row(f"largest W within 8 GiB ({path}, b={MICRO})", float(largest), None, None, unit="W",
                        note=f"estimate: (8 GiB - {base / 2**20:.0f} MiB) / {total_per_worker / 1024:.1f} KiB (whole process); "
                             f"the digits set alone holds W <= {1437 // MICRO}",
                        detail={"largest_workers": largest}))
    return rows
