"""Learning-rate scaling rules: the peak rate at global batch B from a rate tuned at a smaller batch.

A recipe is usually tuned at some base batch B0 with rate lr0. Growing the batch
averages away gradient noise, so the rate can grow too:

- `none`   lr = lr0. Use when the recipe was tuned at the batch you run.
- `linear` lr = lr0 · B/B0 (Goyal et al. 2017, "Accurate, Large Minibatch SGD",
  arXiv 1706.02677). Keeps the progress per sample of SGD roughly constant; needs
  warmup and breaks down past some batch (8192 for their ResNet-50).
- `sqrt`   lr = lr0 · √(B/B0) (Krizhevsky 2014, arXiv 1404.5997; Hoffer, Hubara,
  Soudry 2017, "Train longer, generalize better"). Keeps the variance of the
  update constant; the usual choice for Adam-family optimizers.
- `power`  lr = lr0 · (B/B0)^exponent. Interpolates; fit the exponent with the ladder.

Tuning: use the batch the base rate was tuned at as `scaling.base_batch`, not the
per-worker batch.
"""

from omegaconf import OmegaConf

from scaledrill.errors import ConfigError, is_number, is_whole

RULES = ("none", "linear", "sqrt", "power")


def scaled_lr(rule: str, base_lr: float, base_batch: int | None, global_batch: int, exponent: float = 1.0) -> float:
    """Peak learning rate at `global_batch` under `rule`; a pure function."""
    if rule == "none":
        return float(base_lr)
    ratio = global_batch / base_batch
    power = {"linear": 1.0, "sqrt": 0.5, "power": exponent}[rule]
    return float(base_lr) * ratio**power


def validate_scaling(node) -> None:
    """Check the `scaling` group; each failure names its key."""
    if node.rule not in RULES:
        raise ConfigError("scaling.rule", f"must be one of {', '.join(RULES)}", node.rule)
    base_lr = node.base_lr
    if not is_number(base_lr) or base_lr <= 0:
        raise ConfigError("scaling.base_lr", "must be a positive number", base_lr)
    if node.rule == "none":
        return
    if OmegaConf.is_missing(node, "base_batch") or node.base_batch is None:
        raise ConfigError("scaling.base_batch", f"rule {node.rule} needs the global batch the base lr was tuned at")
    base_batch = node.base_batch
    if not is_whole(base_batch) or base_batch <= 0:
        raise ConfigError("scaling.base_batch", "must be a positive whole number", base_batch)
    if node.rule == "power" and not is_number(node.exponent):
        raise ConfigError("scaling.exponent", "must be a number", node.exponent)
