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
from torch.nn import Parameter

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
    node = settings_of(node)  # the keys not given take their optimizer's defaults (checked by config/rules.py)
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
