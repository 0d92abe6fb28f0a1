"""Build the optimizer named by `optim.name` from a model's named parameters.

| name  | what                                   | weight decay (`optim.decay`)               |
| ----- | -------------------------------------- | ------------------------------------------ |
| sgd   | torch SGD, momentum, optional Nesterov | coupled only (L2 added to the gradient)    |
| adamw | torch AdamW / Adam                     | decoupled (AdamW) or coupled (Adam + L2)   |
| lars  | lars.LARS                              | coupled only (inside the paper's g + βw)   |
| lamb  | lamb.LAMB                              | decoupled (the paper) or coupled           |

Every optimizer gets the groups of groups.py, so excluded parameters (by default
those with one dimension or fewer) are never decayed, and LARS/LAMB skip their
trust ratio. The learning rate given here is a placeholder: the engine sets the
scheduled rate with `set_lr` before every step.
"""

import torch
from omegaconf import ListConfig
from torch.nn import Parameter

from scaledrill.errors import ConfigError, is_number
from scaledrill.optim.groups import param_groups
from scaledrill.optim.lamb import LAMB
from scaledrill.optim.lars import LARS
from scaledrill.optim.settings import settings_of

OPTIMIZERS = ("sgd", "adamw", "lars", "lamb")
DECAY = {"sgd": ("coupled",), "adamw": ("decoupled", "coupled"), "lars": ("coupled",), "lamb": ("decoupled", "coupled")}


def decay_of(node) -> str:
    """`optim.decay`, defaulting to the first form the optimizer supports."""
    return node.get("decay") or DECAY[node.name][0]


def build_optimizer(named_params: list[tuple[str, Parameter]], node) -> torch.optim.Optimizer:
    """The optimizer of the `optim` config group over `named_params`."""
    node = settings_of(node)  # the keys not given take their optimizer's defaults
    validate_optim(node)
    groups = param_groups(named_params, float(node.weight_decay), node.exclude)
    lr, name = float(node.lr), node.name
    if name == "sgd":
        return torch.optim.SGD(groups, lr=lr, momentum=node.momentum, nesterov=bool(node.nesterov))
    if name == "adamw":
        return torch.optim.Adam(groups, lr=lr, betas=tuple(node.betas), eps=node.eps,
                                decoupled_weight_decay=decay_of(node) == "decoupled")
    if name == "lars":
        return LARS(groups, lr=lr, momentum=node.momentum, trust_coefficient=node.trust_coefficient,
                    trust_cap=node.trust_cap, denominator=node.denominator)
    return LAMB(groups, lr=lr, betas=tuple(node.betas), eps=node.eps, decay=decay_of(node),
                bias_correction=bool(node.bias_correction), trust_cap=node.trust_cap)


def set_lr(optimizer: torch.optim.Optimizer, lr: float) -> None:
    """Set every group's rate to `lr` times the group's `lr_scale` (1 unless a group sets one)."""
    for group in optimizer.param_groups:
        group["lr"] = lr * group.get("lr_scale", 1.0)


def validate_optim(node) -> None:
    """Check the `optim` group; each failure names its key."""
    name = node.get("name")
    if name not in OPTIMIZERS:
        raise ConfigError("optim.name", f"must be one of {', '.join(OPTIMIZERS)}", name)
    _check(node, "lr", lambda x: x > 0, "must be a positive number")
    _check(node, "weight_decay", lambda x: x >= 0, "must be a number >= 0")
    _check(node, "clip_norm", lambda x: x > 0, "must be a positive number, or null for no clipping", optional=True)
    decay = decay_of(node)
    if decay not in DECAY[name]:
        raise ConfigError("optim.decay", f"{name} supports {' or '.join(DECAY[name])} weight decay", decay)
    exclude = node.get("exclude")
    if exclude is not None and not (_is_list(exclude) and all(isinstance(p, str) for p in exclude)):
        raise ConfigError("optim.exclude", "must be null (parameters with <= 1 dimension) or a list of name patterns", exclude)
    if name in ("sgd", "lars"):
        _check(node, "momentum", lambda x: 0 <= x < 1, "must be in [0, 1)")
    if name == "sgd" and node.get("nesterov") and not node.get("momentum"):
        raise ConfigError("optim.nesterov", "needs optim.momentum > 0", node.nesterov)
    if name in ("adamw", "lamb"):
        betas = node.get("betas")
        if not (_is_list(betas) and len(betas) == 2 and all(is_number(b) and 0 <= b < 1 for b in betas)):
            raise ConfigError("optim.betas", "must be two numbers in [0, 1)", betas)
        _check(node, "eps", lambda x: x >= 0, "must be a number >= 0")
    if name in ("lars", "lamb"):
        _check(node, "trust_cap", lambda x: x > 0, "must be a positive number, or null for no cap", optional=True)
    if name == "lars":
        _check(node, "trust_coefficient", lambda x: x > 0, "must be a positive number")
        if node.get("denominator") not in ("grad", "update"):
            raise ConfigError("optim.denominator", "must be grad (‖g‖ + β‖w‖) or update (‖g + βw‖)", node.denominator)


def _check(node, key: str, ok, rule: str, optional: bool = False) -> None:
    value = node.get(key)
    if value is None and optional:
        return
    if not is_number(value) or not ok(value):
        raise ConfigError(f"optim.{key}", rule, value)


def _is_list(value) -> bool:
    return isinstance(value, (list, tuple, ListConfig))
