"""Start-up: `scaledrill run train.steps=1` against a plain torch script doing the same.

Cases, each a fresh `python` process timed by wall clock from spawn to exit,
interleaved round by round (every case once per round, after one warm-up round
that fills the page cache):
- scaledrill: `python -m scaledrill.cli run train.steps=1` on the default digits
  task, in a temporary working directory (its run folder goes there);
- plain: plain_digits.py, the same job by hand (torch, the digits set via
  scikit-learn, the same CNN, one SGD step, the test loss);
- torch: `python -c "import torch"`, the floor every torch program pays.
One more `scaledrill run` under `python -X importtime` splits its imports by
top-level package (self time summed), which says where the start-up goes.
"""

import os
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

from .common import ROOT
from .timing import Row, ratios

PLAIN = str(Path(__file__).with_name("plain_digits.py"))
RUN = ("-m", "scaledrill.cli", "run", "train.steps=1")  # as a user types it (the progress bar is on by default)


def _env() -> dict:
    src = str(ROOT / "src")
    path = os.environ.get("PYTHONPATH", "")
    return {**os.environ, "PYTHONPATH": src + (os.pathsep + path if path else "")}


def _seconds(args: tuple[str, ...], cwd: str) -> float:
    started = time.perf_counter()
    done = subprocess.run([sys.executable, *args], cwd=cwd, env=_env(), capture_output=True, text=True, check=False)
    took = time.perf_counter() - started
    if done.returncode:
        raise RuntimeError(f"{' '.join(args)} exited {done.returncode}:\n{done.stderr[-2000:]}")
    return took


def import_split(cwd: str, top: int = 6) -> dict[str, float]:
    """Seconds of import (self time) per top-level package in one `scaledrill run`, largest first."""
    done = subprocess.run([sys.executable, "-X", "importtime", *RUN], cwd=cwd, env=_env(), capture_output=True, text=True, check=True)
    per = defaultdict(float)
    for line in done.stderr.splitlines():
        if not line.startswith("import time:") or "self [us]" in line:
            continue
        own, _, name = line[len("import time:"):].split("|")
        per[name.strip().split(".")[0]] += int(own) / 1e6
    ranked = sorted(per.items(), key=lambda kv: -kv[1])
    return dict(ranked[:top]) | {"other": sum(v for _, v in ranked[top:])}


def run(rounds: int) -> list[Row]:
    cases = {"scaledrill": RUN, "plain": (PLAIN,), "torch": ("-c", "import torch")}
    times: dict[str, list[float]] = {name: [] for name in cases}
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(rounds + 1):  # round 0 warms the page cache and is dropped
            for name, args in cases.items():
                took = _seconds(args, tmp)
                if i:
                    times[name].append(took)
        split = import_split(tmp)
    med = {k: sorted(v)[len(v) // 2] for k, v in times.items()}
    over = ratios(times, "scaledrill", "plain")
    imports = ", ".join(f"{k} {v:.2f}" for k, v in split.items())
    return [
        Row("start-up: scaledrill run train.steps=1 / plain torch script", over["median"], over, None,
            note=f"wall s: scaledrill {med['scaledrill']:.2f}, plain {med['plain']:.2f}, import torch alone {med['torch']:.2f}",
            detail={"seconds": times, "import_self_seconds": split}),
        Row("start-up: scaledrill run - plain torch script", med["scaledrill"] - med["plain"], None, None, unit="s",
            note=f"import self time of the run by package (s): {imports}"),
    ]
