"""The `check:` node of configs/check.yaml, validated into a small record before anything runs."""

from dataclasses import dataclass

from omegaconf import DictConfig, ListConfig

from scaledrill.check.reference import BATCHNORM
from scaledrill.errors import ConfigError, is_number, is_whole

PATHS = ("accumulation", "fused", "vmap", "loop", "processes")
BACKENDS = ("gloo", "mpi")


@dataclass(frozen=True)
class Settings:
    steps: int
    paths: tuple[str, ...]
    backends: tuple[str, ...]
    tolerance_scale: float
    batchnorm: str
    step: object  # None or the `check.step` node


def _names(node, key: str, allowed: tuple[str, ...]) -> tuple[str, ...]:
    value = node.get(key)
    if not isinstance(value, (list, tuple, ListConfig)) or not value or any(v not in allowed for v in value):
        raise ConfigError(f"check.{key}", f"must be a non-empty list of {', '.join(allowed)}", value)
    return tuple(value)


def read_settings(cfg) -> Settings:
    node = cfg.get("check")
    if node is None:
        raise ConfigError("check", "missing; use the check config (scaledrill/conf/check.yaml)")
    steps = node.steps
    if not is_whole(steps) or steps < 1:
        raise ConfigError("check.steps", "must be a whole number >= 1", steps)
    scale = node.tolerance_scale
    if not is_number(scale) or not scale > 0:
        raise ConfigError("check.tolerance_scale", "must be a number > 0", scale)
    batchnorm = node.batchnorm
    if batchnorm not in BATCHNORM:
        raise ConfigError("check.batchnorm", f"must be one of {', '.join(BATCHNORM)}", batchnorm)
    step = node.get("step")
    if step is not None and not (isinstance(step, (dict, DictConfig)) and isinstance(step.get("_target_"), str)):
        raise ConfigError("check.step", "must be null or a node with a _target_ naming your step function", step)
    if cfg.sync.name != "exact":
        raise ConfigError("sync.name", "check compares exact averaging with the true batch; a lossy compressor never matches it", cfg.sync.name)
    return Settings(steps, _names(node, "paths", PATHS), _names(node, "backends", BACKENDS), float(scale), batchnorm, step)
