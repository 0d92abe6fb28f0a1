"""Check a whole configuration before any process starts.

Each part validates its own keys (layout, optimizer and recipe, sync, telemetry);
this module only runs them in order and checks the keys of `train`.
"""

from scaledrill.errors import ConfigError
from scaledrill.layout import Layout


def _positive_int(cfg, key: str, allow_zero: bool = False) -> None:
    value = cfg.train[key]
    low = 0 if allow_zero else 1
    if not isinstance(value, int) or isinstance(value, bool) or value < low:
        rule = "must be a whole number >= 0" if allow_zero else "must be a positive whole number"
        raise ConfigError(f"train.{key}", rule, value)


PRECISIONS = ("fp32", "bf16", "fp16")  # train.precision and train.accum_dtype (train/precision.py)
UNIT_ROUNDOFF = {"fp32": 2.0**-24, "bf16": 2.0**-8, "fp16": 2.0**-11}  # u = 2^-(significand bits incl. the hidden one)
SCALER_DEFAULTS = {"start": 65536.0, "grow": 2.0, "shrink": 0.5, "patience": 2000}  # common practice (train.scaler)
PATHS = ("auto", "fused", "vmap", "loop")  # train.grads: how per-worker gradients are computed
BATCHNORM = ("worker", "global")  # whose samples BatchNorm's statistics come from


def batchnorm_path_error(cause: str) -> ConfigError:
    """train.batchnorm=global on a per-worker gradient path, which `cause` selected."""
    return ConfigError(
        "train.batchnorm",
        f"global needs the fused gradient path, but {cause} computes each worker on its own and a worker cannot see "
        "the other workers' samples; use train.batchnorm=worker, or train.grads=fused with a sync that sums per process",
        "global",
    )


def _per_worker_cause(cfg) -> str | None:
    """The setting that puts the run on a per-worker gradient path (the engine's choice, from the config alone)."""
    from scaledrill.sync.compress import build

    sync = cfg.sync
    if sync.get("bitwise", False):
        return "sync.bitwise=true"
    if sync.get("error_feedback", False) or build(sync).per_worker:
        return f"sync={sync.name}" + (" with error_feedback" if sync.get("error_feedback", False) else "")
    if cfg.train.grads in ("vmap", "loop"):
        return f"train.grads={cfg.train.grads}"
    return None


def validate_batchnorm(cfg) -> None:
    mode = cfg.train.get("batchnorm", "worker")
    if mode not in BATCHNORM:
        raise ConfigError("train.batchnorm", f"must be {' or '.join(BATCHNORM)}", mode)
    cause = _per_worker_cause(cfg) if mode == "global" else None
    if cause is not None:
        raise batchnorm_path_error(cause)


def is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and value == value and abs(value) != float("inf")


def validate_precision(train) -> None:
    """Raise ConfigError naming the first bad key among train.precision, accum_dtype, loss_scale, scaler."""
    for key in ("precision", "accum_dtype"):
        value = train.get(key, "fp32")
        if value not in PRECISIONS:
            raise ConfigError(f"train.{key}", f"must be one of {', '.join(PRECISIONS)}", value)
    scale = train.get("loss_scale", "dynamic")
    if scale not in ("dynamic", "none") and not (is_number(scale) and scale > 0):
        raise ConfigError("train.loss_scale", "must be dynamic, none, or a positive number (a fixed scale)", scale)
    given = train.get("scaler") or {}
    unknown = sorted(set(given) - set(SCALER_DEFAULTS))
    if unknown:
        raise ConfigError(f"train.scaler.{unknown[0]}", f"unknown key; known: {', '.join(SCALER_DEFAULTS)}")
    s = {k: given.get(k, v) for k, v in SCALER_DEFAULTS.items()}
    rules = {
        "start": (lambda v: is_number(v) and v > 0, "must be a positive number"),
        "grow": (lambda v: is_number(v) and v > 1, "must be a number above 1"),
        "shrink": (lambda v: is_number(v) and 0 < v < 1, "must lie strictly between 0 and 1"),
        "patience": (lambda v: isinstance(v, int) and not isinstance(v, bool) and v >= 1, "must be a whole number of at least 1"),
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
    if cfg.train.grads not in PATHS:
        raise ConfigError("train.grads", f"must be one of {', '.join(PATHS)}", cfg.train.grads)
    if cfg.train.dtype not in ("float32", "float64"):
        raise ConfigError("train.dtype", "must be float32 or float64", cfg.train.dtype)
    validate_precision(cfg.train)
    timeout = cfg.train.timeout_s
    if not isinstance(timeout, (int, float)) or isinstance(timeout, bool) or timeout <= 0:
        raise ConfigError("train.timeout_s", "must be a positive number of seconds", timeout)


def validate_run(cfg) -> Layout:
    """Raise ConfigError naming the first bad key; return the layout when all is well."""
    layout = Layout.from_config(cfg.layout)
    validate_train(cfg)
    from scaledrill import optim, sync, telemetry

    optim.validate(cfg)
    sync.validate(cfg.sync)
    validate_batchnorm(cfg)  # after sync: which gradient path the sync needs
    telemetry.validate(cfg.telemetry)
    return layout
