"""Check a whole configuration before any process starts.

Each part validates its own keys (layout, optimizer and recipe, sync, telemetry);
this module only runs them in order and checks the keys of `train`.
"""

from scaledrill.errors import ConfigError, is_number, is_whole
from scaledrill.layout import Layout
from scaledrill.sync.path import PATHS, grad_path, path_cause


def _positive_int(cfg, key: str, allow_zero: bool = False) -> None:
    value = cfg.train[key]
    low = 0 if allow_zero else 1
    if not is_whole(value) or value < low:
        rule = "must be a whole number >= 0" if allow_zero else "must be a positive whole number"
        raise ConfigError(f"train.{key}", rule, value)


PRECISIONS = ("fp32", "bf16", "fp16")  # train.precision and train.accum_dtype (train/precision.py)
BATCHNORM = ("worker", "global")  # whose samples BatchNorm's statistics come from


def batchnorm_path_error(cause: str) -> ConfigError:
    """train.batchnorm=global on a per-worker gradient path, which `cause` selected."""
    return ConfigError(
        "train.batchnorm",
        f"global needs the fused gradient path, but {cause} computes each worker on its own and a worker cannot see "
        "the other workers' samples; use train.batchnorm=worker, or train.grads=fused with a sync that sums per process",
        "global",
    )


def validate_batchnorm(cfg) -> None:
    mode = cfg.train.batchnorm
    if mode not in BATCHNORM:
        raise ConfigError("train.batchnorm", f"must be {' or '.join(BATCHNORM)}", mode)
    cause = path_cause(cfg.train.grads, cfg.sync) if mode == "global" else None
    if cause is not None:
        raise batchnorm_path_error(cause)



def validate_precision(train) -> None:
    """Raise ConfigError naming the first bad key among train.precision, accum_dtype, loss_scale, scaler."""
    for key in ("precision", "accum_dtype"):
        value = train[key]
        if value not in PRECISIONS:
            raise ConfigError(f"train.{key}", f"must be one of {', '.join(PRECISIONS)}", value)
    scale = train.loss_scale
    if scale not in ("dynamic", "none") and not (is_number(scale) and scale > 0):
        raise ConfigError("train.loss_scale", "must be dynamic, none, or a positive number (a fixed scale)", scale)
    s = train.scaler
    rules = {
        "start": (lambda v: is_number(v) and v > 0, "must be a positive number"),
        "grow": (lambda v: is_number(v) and v > 1, "must be a number above 1"),
        "shrink": (lambda v: is_number(v) and 0 < v < 1, "must lie strictly between 0 and 1"),
        "patience": (lambda v: is_whole(v) and v >= 1, "must be a whole number of at least 1"),
    }
    for key, (ok, rule) in rules.items():
        if not ok(s[key]):
            raise ConfigError(f"train.scaler.{key}", rule, s[key])


def validate_train(cfg) -> None:
    _positive_int(cfg, "steps")
    _positive_int(cfg, "eval_every", allow_zero=True)
    _positive_int(cfg, "checkpoint_every", allow_zero=True)
    if not isinstance(cfg.train.seed, int):
        raise ConfigError("train.seed", "must be a whole number", cfg.train.seed)
    if cfg.train.tail not in ("drop", "carry"):
        raise ConfigError("train.tail", "must be drop or carry", cfg.train.tail)
    if cfg.train.get("order", "layout") not in ("layout", "torch_distributed"):
        raise ConfigError("train.order", "must be layout or torch_distributed", cfg.train.order)
    if cfg.train.grads not in PATHS:
        raise ConfigError("train.grads", f"must be one of {', '.join(PATHS)}", cfg.train.grads)
    if cfg.train.dtype not in ("float32", "float64"):
        raise ConfigError("train.dtype", "must be float32 or float64", cfg.train.dtype)
    validate_precision(cfg.train)
    timeout = cfg.train.timeout_s
    if not is_number(timeout) or timeout <= 0:
        raise ConfigError("train.timeout_s", "must be a positive number of seconds", timeout)


def validate_run(cfg) -> Layout:
    """Raise ConfigError naming the first bad key; return the layout when all is well."""
    layout = Layout.from_config(cfg.layout)
    validate_train(cfg)
    from scaledrill import optim, sync, telemetry

    optim.validate(cfg)
    sync.validate(cfg.sync)
    validate_batchnorm(cfg)  # after sync: which gradient path the sync needs
    grad_path(cfg.train.grads, cfg.sync)  # fused cannot serve a sync that needs per-worker rows
    telemetry.validate(cfg.telemetry)
    return layout
