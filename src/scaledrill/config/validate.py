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
