"""Which gradient path a run takes, decided from the configuration alone.

A worker's gradient can reach the sync layer two ways: summed over the process's
V workers by one backward pass (the `fused` path, one [1, n] row), or one row per
worker (`vmap`, or `loop`, which computes each worker alone). A sync that
compresses each worker's gradient, keeps per-worker error feedback, or sums along
the fixed tree of `sync.bitwise` needs the rows; exact averaging does not. This
module is the one place that rule lives: config validation, the engine and the
checks all ask it (docs/design.md, "Gradient paths").
"""

from scaledrill.errors import ConfigError
from scaledrill.sync.compress import build

PATHS = ("auto", "fused", "vmap", "loop")  # train.grads (config/rules.py checks it is one of them)


def per_worker_cause(sync) -> str | None:
    """The `sync.*` setting that needs each worker's own gradient row, or None when a per-process sum will do."""
    if sync.get("bitwise", False):
        return "sync.bitwise=true"
    name = sync.get("name", "exact")
    if sync.get("error_feedback", False):
        return f"sync={name} with error_feedback"
    if build(sync).per_worker:
        return f"sync={name}"
    return None


def path_cause(asked, sync) -> str | None:
    """The setting that puts the run on a per-worker path (vmap or loop), or None when it takes the fused one."""
    cause = per_worker_cause(sync)
    if cause is None and asked in ("vmap", "loop"):
        return f"train.grads={asked}"
    return cause


def grad_path(asked, sync) -> str:
    """The path `train.grads=asked` resolves to under the `sync` node: fused, vmap or loop.

    `auto` takes the cheapest path the sync can use: fused when a per-process sum
    will do, loop for the bitwise tree (rows that do not depend on V; sync/tree.py),
    vmap otherwise. Asking for fused under a sync that needs rows is a ConfigError."""
    cause = per_worker_cause(sync)
    if asked == "fused" and cause is not None:
        raise ConfigError(
            "train.grads", f"fused cannot serve {cause}, which needs each worker's gradient; use auto, vmap or loop", asked
        )
    if asked != "auto":
        return asked
    if cause is None:
        return "fused"
    return "loop" if sync.get("bitwise", False) else "vmap"
