"""Parameter groups: which parameters get weight decay and the layer-wise trust ratio.

Common practice (You et al. 2017; Goyal et al. 2017): biases and normalization
scales and shifts, the parameters with one dimension or fewer, get neither
weight decay nor the trust ratio. Decaying them pulls a BatchNorm scale towards
zero, and their norms are too small for a per-layer ratio to mean much.

`optim.exclude` picks the excluded parameters:
- null (the default): every parameter with one dimension or fewer;
- a list of name patterns (shell-style, `fnmatch`, against the dotted name from
  `named_parameters()`), e.g. `["*.bias", "*norm*"]`; an empty list excludes nothing.

The result is at most two groups, `adapt` and `exclude`. Each group carries its
parameter names, so LARS and LAMB can report trust ratios by name, and its own
weight decay (0 for `exclude`). `adapt` is a group flag LARS and LAMB read.
"""

from fnmatch import fnmatchcase

from torch.nn import Parameter


def is_excluded(name: str, param: Parameter, patterns) -> bool:
    """True when `param` gets neither weight decay nor the trust ratio."""
    if patterns is None:
        return param.ndim <= 1
    return any(fnmatchcase(name, pattern) for pattern in patterns)


def describe_exclusions(patterns) -> str:
    """The exclusion rule in words, for the printed recipe."""
    if patterns is None:
        return "parameters with one dimension or fewer (biases, norm scales)"
    if not patterns:
        return "none"
    return "names matching " + ", ".join(patterns)


def param_groups(named_params: list[tuple[str, Parameter]], weight_decay: float, patterns) -> list[dict]:
    """Split into an `adapt` group (decayed, trust ratio) and an `exclude` group (neither); drop empty ones."""
    patterns = None if patterns is None else list(patterns)
    split = {True: ([], []), False: ([], [])}
    for name, param in named_params:
        if param.requires_grad:
            names, params = split[is_excluded(name, param, patterns)]
            names.append(name)
            params.append(param)
    groups = [
        {"params": split[False][1], "param_names": split[False][0], "weight_decay": weight_decay, "adapt": True},
        {"params": split[True][1], "param_names": split[True][0], "weight_decay": 0.0, "adapt": False},
    ]
    return [g for g in groups if g["params"]]
