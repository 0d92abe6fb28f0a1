"""Telemetry: what a run measures about itself, and where it keeps it.

- noise_scale: the gradient noise scale B_simple (McCandlish et al. 2018)
- layers: per-layer weight, gradient and update norms
- detectors: divergence detectors (non-finite, loss spike, gradient explosion)
- store: the SQLite run store and its read-only reader
- incident: the JSON record written when a detector fires

The rules on the `telemetry` group's keys live in config/rules.py (`check_telemetry`).
"""

from scaledrill.telemetry.detectors import build_detectors
from scaledrill.telemetry.incident import write_incident
from scaledrill.telemetry.layers import layer_stats
from scaledrill.telemetry.noise_scale import NoiseScale
from scaledrill.telemetry.store import RunStore, open_store, read_events, read_layers, read_runs, read_scalars

__all__ = [
    "NoiseScale", "RunStore", "build_detectors", "layer_stats", "open_store", "read_events",
    "read_layers", "read_runs", "read_scalars", "write_incident",
]
