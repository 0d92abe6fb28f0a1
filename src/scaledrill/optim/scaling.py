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

RULES = ("none", "linear", "sqrt", "power")  # scaling.rule (checked by config/rules.py)


def scaled_lr(rule: str, base_lr: float, base_batch: int | None, global_batch: int, exponent: float = 1.0) -> float:
    """Peak learning rate at `global_batch` under `rule`; a pure function."""
    if rule == "none":
        return float(base_lr)
    ratio = global_batch / base_batch
    power = {"linear": 1.0, "sqrt": 0.5, "power": exponent}[rule]
    return float(base_lr) * ratio**power
