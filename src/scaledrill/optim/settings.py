"""The keys of the `optim` group, their types and defaults: one dataclass per optimizer.

The config group's schema (registered by scaledrill.config.store) and the defaults
`build_optimizer` fills in when a caller passes only some keys, from one place.
"""

from dataclasses import asdict, dataclass, field
from typing import Optional

from omegaconf import MISSING, DictConfig, OmegaConf


@dataclass
class OptimConfig:
    name: str = MISSING
    lr: float = MISSING  # rate at scaling.base_batch; the scaling rule and schedule derive the rest
    weight_decay: float = 0.0
    decay: str = "coupled"  # coupled: L2 added to the gradient | decoupled: λw added to the update
    exclude: Optional[list[str]] = None  # null: no decay for parameters with <= 1 dimension; or a list of name patterns
    clip_norm: Optional[float] = None  # clip by global norm after averaging; null = off


@dataclass
class SgdConfig(OptimConfig):
    name: str = "sgd"
    lr: float = 0.1
    momentum: float = 0.9
    nesterov: bool = False


@dataclass
class AdamwConfig(OptimConfig):
    name: str = "adamw"
    lr: float = 0.001
    betas: list[float] = field(default_factory=lambda: [0.9, 0.999])
    eps: float = 1.0e-8
    weight_decay: float = 0.01
    decay: str = "decoupled"


@dataclass
class LambConfig(AdamwConfig):
    name: str = "lamb"
    eps: float = 1.0e-6
    bias_correction: bool = True
    trust_cap: Optional[float] = None  # optional cap on the trust ratio


@dataclass
class LarsConfig(OptimConfig):
    name: str = "lars"
    lr: float = 1.0  # each layer moves by lr · trust_coefficient · ‖w‖/‖g‖ of its gradient
    momentum: float = 0.9
    weight_decay: float = 0.0005
    trust_coefficient: float = 0.001  # η of the paper
    trust_cap: Optional[float] = None  # optional cap on the trust ratio
    denominator: str = "grad"  # grad: ‖g‖ + β‖w‖ (the paper) | update: ‖g + βw‖


VARIANTS = {c.name: c for c in (SgdConfig, AdamwConfig, LambConfig, LarsConfig)}


def settings_of(node) -> DictConfig:
    """`node` (an `optim` node or dict, possibly partial) over its optimizer's defaults; values are not converted."""
    given = OmegaConf.to_container(node) if isinstance(node, DictConfig) else dict(node)
    kind = VARIANTS.get(given.get("name"))
    return OmegaConf.merge(OmegaConf.create(asdict(kind()) if kind else {}), given)
