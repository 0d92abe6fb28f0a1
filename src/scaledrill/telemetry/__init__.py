"""Telemetry: what a run measures about itself, and where it keeps it.

- noise_scale: the gradient noise scale B_simple (McCandlish et al. 2018)
- layers: per-layer weight, gradient and update norms
- detectors: divergence detectors (non-finite, loss spike, gradient explosion)
- store: the SQLite run store and its read-only reader
- incident: the JSON record written when a detector fires

`validate(cfg.telemetry)` checks every key of the `telemetry` config group.
"""

import math

from scaledrill.errors import ConfigError, is_number, is_whole
from scaledrill.telemetry.detectors import build_detectors, validate_detect
from scaledrill.telemetry.incident import write_incident
from scaledrill.telemetry.layers import layer_stats
from scaledrill.telemetry.noise_scale import NoiseScale
from scaledrill.telemetry.settings import DEFAULTS
from scaledrill.telemetry.store import RunStore, open_store, read_events, read_layers, read_runs, read_scalars

__all__ = [
    "NoiseScale", "RunStore", "build_detectors", "layer_stats", "open_store", "read_events",
    "read_layers", "read_runs", "read_scalars", "validate", "write_incident",
]


def _count(cfg, key: str, least: int) -> None:
    value = cfg.get(key, getattr(DEFAULTS, key))
    if not is_whole(value) or value < least:
        raise ConfigError(f"telemetry.{key}", f"must be a whole number of at least {least}", value)


def validate(cfg_telemetry) -> None:
    """Raise ConfigError naming the first bad key of the `telemetry` group."""
    _count(cfg_telemetry, "layer_every", 0)
    _count(cfg_telemetry, "flush_every", 1)
    _count(cfg_telemetry, "noise_every", 0)
    if not isinstance(cfg_telemetry.get("blame", DEFAULTS.blame), bool):
        raise ConfigError("telemetry.blame", "must be true or false", cfg_telemetry.get("blame"))
    if not isinstance(cfg_telemetry.get("tensorboard", DEFAULTS.tensorboard), bool):
        raise ConfigError("telemetry.tensorboard", "must be true or false", cfg_telemetry.get("tensorboard"))
    NoiseScale(decay=cfg_telemetry.get("noise_decay", DEFAULTS.noise_decay))  # checks telemetry.noise_decay
    validate_detect(cfg_telemetry)
    incident = cfg_telemetry.get("incident") or {}
    steps = incident.get("steps", DEFAULTS.incident.steps)
    if not is_whole(steps) or steps < 1:
        raise ConfigError("telemetry.incident.steps", "must be a whole number of at least 1", steps)
    factor = incident.get("factor", DEFAULTS.incident.factor)
    if not is_number(factor) or not (math.isfinite(factor) and factor > 1):
        raise ConfigError("telemetry.incident.factor", "must be a number above 1", factor)
