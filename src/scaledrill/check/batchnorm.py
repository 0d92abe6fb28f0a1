"""Which BatchNorm statistics the check's paths train with, and which paths can serve check.batchnorm=global.

`check.batchnorm` picks the reference's statistics, and every engine path trains with
the same `train.batchnorm`, so both sides normalise over the same samples:
- worker: each group of b samples on its own, what every worker computes alone;
- global: the whole global batch of B = W·b·k samples. The engine's
  train.batchnorm=global normalises over the W·b samples of one micro-step (fused
  gradient path, summed across processes), which is all of B only when k = 1.

Rules, for a model with GhostBatchNorm modules (for any other model both settings
compute the same thing and paths train with `worker`, which every path serves):
1. global with layout.accum > 1: refused before anything runs, since no path
   normalises over all B samples at once;
2. worker while the recipe says train.batchnorm=global: refused, since the recipe
   computes other statistics than the reference;
3. global: a path whose BatchNorm cannot see all B samples (accumulation, the
   per-worker paths vmap and loop, a per-worker sync, a custom step) is skipped with
   the reason, as the check skips any path it cannot serve; runner.py refuses when
   that leaves nothing to compare.
"""

from scaledrill.check.paths import variant
from scaledrill.check.reference import build_model
from scaledrill.config.rules import check_batchnorm_path
from scaledrill.errors import ConfigError
from scaledrill.layout import Layout
from scaledrill.nn.ghost_bn import GhostBatchNorm

KEY = "check.batchnorm"


def has_batchnorm(cfg) -> bool:
    return any(isinstance(m, GhostBatchNorm) for m in build_model(cfg).model.modules())


def path_batchnorm(cfg, settings, model_has_batchnorm: bool) -> str:
    """The train.batchnorm every path of this check trains with; raises ConfigError for rules 1 and 2."""
    L = cfg.layout
    B, per_step = Layout.from_config(L).global_batch, L.workers * L.micro_batch
    if not model_has_batchnorm or B == L.micro_batch:  # no BatchNorm, or one group is the whole batch
        return "worker"
    if settings.batchnorm == "worker" and cfg.train.batchnorm == "global":
        raise ConfigError(KEY, f"worker compares with BatchNorm statistics per group of b = {L.micro_batch} samples, but the recipe "
                          f"normalises over all W·b = {per_step} samples of each micro-step (train.batchnorm=global); "
                          "use check.batchnorm=global (with layout.accum=1) to compare it with the true batch", "worker")
    if settings.batchnorm == "global" and L.accum > 1:
        raise ConfigError(KEY, f"global compares with BatchNorm over the whole global batch of B = W·b·k = {B} samples, but with "
                          f"layout.accum={L.accum} every micro-step normalises only its own W·b = {per_step} samples "
                          "(train.batchnorm=global), so no path can match; use layout.accum=1, or check.batchnorm=worker "
                          "to compare per-worker statistics", "global")
    return settings.batchnorm


def unserved(cfg, name: str) -> str | None:
    """Why path `name` cannot normalise over the whole global batch (rule 3), or None when it can."""
    kind, _, detail = name.partition(":")
    L = cfg.layout
    if kind == "step":
        return (f"{KEY}=global: a custom step's thread-workers each normalise their own b = {L.micro_batch} samples "
                "(check.step), never the whole batch")
    if kind == "accumulation":
        return (f"{KEY}=global: accumulation normalises each of its W·k = {L.workers * L.accum} micro-batches of "
                f"b = {L.micro_batch} samples on its own, never the whole batch")
    grads = detail if kind == "workers" else cfg.train.grads
    try:
        check_batchnorm_path(variant(cfg, **{"train.grads": grads, "train.batchnorm": "global"}))
    except ConfigError as err:  # the engine's own rule for where global statistics can run
        return f"{KEY}=global trains it with train.batchnorm=global, which the engine refuses: {err.rule.split(';')[0]}"
    return None
