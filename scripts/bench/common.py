"""What every benchmark needs: configs composed like the CLI, trainers, pinned threads."""

import os
from pathlib import Path

import torch
from hydra import compose, initialize_config_dir

import scaledrill.config.store  # noqa: F401  (the schemas, before any composition)

ROOT = Path(__file__).resolve().parents[2]
CONFIGS = str(ROOT / "src" / "scaledrill" / "conf")

# The setting of the issue: 64 workers of 8 samples, one optimizer step of B = 512.
WORKERS, MICRO = 64, 8
QUIET = ("telemetry.layer_every=0", "telemetry.noise_every=0", "train.progress=false")


def pin_threads(threads: int) -> None:
    """Fix intra-op threads in this process, so a child never grabs every core on its own."""
    os.environ["OMP_NUM_THREADS"] = str(threads)
    torch.set_num_threads(threads)


def config(*overrides: str, workers: int = WORKERS, micro: int = MICRO):
    """The `run` config with telemetry off and the given layout, plus `overrides` (later ones win)."""
    base = [f"layout.workers={workers}", f"layout.micro_batch={micro}", *QUIET, *overrides]
    with initialize_config_dir(CONFIGS, version_base=None):
        return compose("run", overrides=base)


def trainer(*overrides: str, workers: int = WORKERS, micro: int = MICRO, collective=None):
    """A Trainer on one process (or on `collective`), built as `scaledrill run` would build it."""
    from scaledrill.dist import LocalCollective
    from scaledrill.train.engine import Trainer

    return Trainer(config(*overrides, workers=workers, micro=micro), collective or LocalCollective())


def batch_fetch(tr):
    """A function that gathers this process's samples of the next step from the training set,
    walking the run's own sample order (one epoch of indices, then around again), as a
    hand-written loop over a shuffled in-memory set takes different rows each step. The same
    rows every step would stay in the CPU's caches and flatter the baseline."""
    data = tr.task.data.train
    steps = max(1, data.size // tr.layout.global_batch) if data.size else 64
    indices = [tr.sampler.worker_batches(s, tr.workers)[0].reshape(-1) for s in range(steps)]
    at = 0

    def fetch():
        nonlocal at
        at = (at + 1) % steps
        return data.take(indices[at])

    return fetch
