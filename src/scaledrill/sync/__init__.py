"""Gradient averaging across simulated workers, with optional compression.

`build_sync(cfg.sync, layout, shapes, collective, seed)` gives a `SyncLayer`;
the engine calls `reduce` once per optimizer step. See layer.py for the
contract, buckets.py for how bytes travel, compress/ for the methods and
feedback.py for error feedback.
"""

from scaledrill.sync.layer import SyncLayer, build_sync

__all__ = ["SyncLayer", "build_sync"]
