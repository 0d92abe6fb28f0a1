"""The `check:` node of configs/check.yaml, checked (config/rules.py) into a small record before anything runs."""

from dataclasses import dataclass

from scaledrill.config.rules import check_check


@dataclass(frozen=True)
class Settings:
    steps: int
    paths: tuple[str, ...]
    backends: tuple[str, ...]
    tolerance_scale: float
    batchnorm: str
    step: object  # None or the `check.step` node


def read_settings(cfg) -> Settings:
    """The `check` node as Settings, after its rules (config/rules.py, `check_check`)."""
    check_check(cfg)
    node = cfg.check
    return Settings(node.steps, tuple(node.paths), tuple(node.backends), float(node.tolerance_scale), node.batchnorm,
                    node.get("step"))
