"""The project's own rules on configuration values: ranges, one-of, divisibility, cross-key rules.

The schemas (schema.py, verbs_schema.py, <part>/settings.py) say which keys exist and
their types; this module holds every rule on their values: the groups of a run (layout,
train, optim, scaling, schedule, sync, telemetry), the real job (`job`) and the verbs'
own keys (check, ladder, ladder.search, replay, adopt). config/validate.py applies the
rules of a run; a verb applies its own before it reads them. The parts trust a node that
passed and keep no copy of a rule.

Most rules are rows of a table, key -> (predicate, rule text), checked in order; the
first failure is a ConfigError naming the dotted key. A key the node does not hold is
skipped (a composed configuration holds every key of its schema; `telemetry` is filled
from its defaults first, so a caller may pass only some keys). A rule that reads two keys
is a named function after its table.

Not here, because they judge no configuration value on its own: a cluster description
(the `forecast` group, forecast/cluster.py) and the files a forecast reads; a user's
model, data and loss (tasks/); values computed at run time: a ladder's rungs
(ladder/rungs.py), a dataset smaller than one global batch, warmup in epochs against the
data's size, with `check_warmup` of optim/schedules.py as the one statement of that rule,
replay.steps against the checkpoint's step; the run directory (train/rundir.py); and the
machine: cores, ports that are taken, mpiexec, a journal file's directory (ladder/,
dist/launch.py, ladder/search.py). Which gradient path a sync needs is decided in one
place, sync/path.py; the rules here ask it.
"""

import math
import re
import shlex
from dataclasses import asdict
from typing import Any, Callable

from omegaconf import DictConfig, ListConfig, OmegaConf

from scaledrill.errors import ConfigError, is_number, is_whole
from scaledrill.layout import BACKENDS
from scaledrill.optim.build import DECAY, OPTIMIZERS, decay_of
from scaledrill.optim.scaling import RULES as SCALING_RULES
from scaledrill.optim.schedules import SHAPES, check_warmup, horizon_of
from scaledrill.sync.compress import NAMES as COMPRESSORS
from scaledrill.sync.path import PATHS, grad_path, path_cause
from scaledrill.sync.settings import KEYS as SYNC_KEYS
from scaledrill.tasks.sampler import ORDERS, TAILS
from scaledrill.telemetry.settings import DEFAULTS as TELEMETRY_DEFAULTS

Rule = tuple[Callable[[Any], bool], str]  # (the value is fine, what the rule asks)

PRECISIONS = ("fp32", "bf16", "fp16")  # train.precision and train.accum_dtype (train/precision.py)
BATCHNORM = ("worker", "global")  # whose samples BatchNorm's statistics come from (train.batchnorm, check.batchnorm)
CHECK_PATHS = ("accumulation", "fused", "vmap", "loop", "processes")  # check.paths
CHECK_BACKENDS = ("gloo", "mpi")  # check.backends


def _whole_at_least(low: int) -> Callable[[Any], bool]:
    return lambda v: is_whole(v) and v >= low


def _finite(v) -> bool:
    return is_number(v) and math.isfinite(v)


def _is_list(value) -> bool:
    return isinstance(value, (list, tuple, ListConfig))


def _bool(v) -> bool:
    return isinstance(v, bool)


TRUE_OR_FALSE: Rule = (_bool, "must be true or false")
POSITIVE_WHOLE: Rule = (_whole_at_least(1), "must be a positive whole number")

_ABSENT = object()


def _lookup(node, dotted: str):
    for part in dotted.split("."):
        if not isinstance(node, (dict, DictConfig)) or part not in node:
            return _ABSENT
        node = node[part]
    return node


def apply(prefix: str, node, table: dict[str, Rule]) -> None:
    """Check every row of `table` against `node`; raise ConfigError naming `prefix.key` for the first failure."""
    for key, (ok, rule) in table.items():
        value = _lookup(node, key)
        if value is not _ABSENT and not ok(value):
            raise ConfigError(f"{prefix}.{key}", rule, value)


# ---------------------------------------------------------------------------------------------- layout

LAYOUT: dict[str, Rule] = {
    "workers": POSITIVE_WHOLE,
    "procs": POSITIVE_WHOLE,
    "micro_batch": POSITIVE_WHOLE,
    "accum": POSITIVE_WHOLE,
    "backend": (lambda v: v in BACKENDS, f"must be one of {', '.join(BACKENDS)}"),
    "port": (lambda v: v is None or (is_whole(v) and 0 < v < 65536), "must be a port number from 1 to 65535, or null for a free one"),
}


def check_layout(node) -> None:
    apply("layout", node, LAYOUT)
    if node["workers"] % node["procs"]:
        raise ConfigError(
            "layout.workers",
            f"must be a multiple of layout.procs={node['procs']}, since every process hosts the same number of workers",
            node["workers"],
        )
    if node["backend"] == "local" and node["procs"] != 1:
        raise ConfigError("layout.procs", "the local backend runs one process; use gloo or mpi for more", node["procs"])


# ----------------------------------------------------------------------------------------------- train

TRAIN: dict[str, Rule] = {
    "steps": POSITIVE_WHOLE,
    "eval_every": (_whole_at_least(0), "must be a whole number >= 0"),
    "checkpoint_every": (_whole_at_least(0), "must be a whole number >= 0"),
    "seed": (is_whole, "must be a whole number"),
    "tail": (lambda v: v in TAILS, "must be drop or carry"),
    "order": (lambda v: v in ORDERS, "must be layout or torch_distributed"),
    "grads": (lambda v: v in PATHS, f"must be one of {', '.join(PATHS)}"),
    "dtype": (lambda v: v in ("float32", "float64"), "must be float32 or float64"),
    "precision": (lambda v: v in PRECISIONS, f"must be one of {', '.join(PRECISIONS)}"),
    "accum_dtype": (lambda v: v in PRECISIONS, f"must be one of {', '.join(PRECISIONS)}"),
    "loss_scale": (lambda v: v in ("dynamic", "none") or (is_number(v) and v > 0),
                   "must be dynamic, none, or a positive number (a fixed scale)"),
    "scaler.start": (lambda v: is_number(v) and v > 0, "must be a positive number"),
    "scaler.grow": (lambda v: is_number(v) and v > 1, "must be a number above 1"),
    "scaler.shrink": (lambda v: is_number(v) and 0 < v < 1, "must lie strictly between 0 and 1"),
    "scaler.patience": (_whole_at_least(1), "must be a whole number of at least 1"),
    "timeout_s": (lambda v: is_number(v) and v > 0, "must be a positive number of seconds"),
    "torch_sampler.shuffle": TRUE_OR_FALSE,
    "torch_sampler.drop_last": TRUE_OR_FALSE,
    "torch_sampler.seed": (is_whole, "must be a whole number"),
    "batchnorm": (lambda v: v in BATCHNORM, f"must be {' or '.join(BATCHNORM)}"),
}


def check_train(train) -> None:
    apply("train", train, TRAIN)


def batchnorm_path_error(cause: str) -> ConfigError:
    """train.batchnorm=global on a per-worker gradient path, which `cause` selected."""
    return ConfigError(
        "train.batchnorm",
        f"global needs the fused gradient path, but {cause} computes each worker on its own and a worker cannot see "
        "the other workers' samples; use train.batchnorm=worker, or train.grads=fused with a sync that sums per process",
        "global",
    )


def check_batchnorm_path(cfg) -> None:
    """train.batchnorm=global needs the fused path, which train.grads and the sync decide (sync/path.py)."""
    cause = path_cause(cfg.train.grads, cfg.sync) if cfg.train.batchnorm == "global" else None
    if cause is not None:
        raise batchnorm_path_error(cause)


def check_grad_path(cfg) -> None:
    """train.grads=fused cannot serve a sync that needs per-worker rows (grad_path raises the ConfigError)."""
    grad_path(cfg.train.grads, cfg.sync)


# ----------------------------------------------------------------------------------------------- optim

OPTIM: dict[str, Rule] = {  # every optimizer
    "lr": (lambda v: is_number(v) and v > 0, "must be a positive number"),
    "weight_decay": (lambda v: is_number(v) and v >= 0, "must be a number >= 0"),
    "clip_norm": (lambda v: v is None or (is_number(v) and v > 0), "must be a positive number, or null for no clipping"),
    "exclude": (lambda v: v is None or (_is_list(v) and all(isinstance(p, str) for p in v)),
                "must be null (parameters with <= 1 dimension) or a list of name patterns"),
}
_MOMENTUM: Rule = (lambda v: is_number(v) and 0 <= v < 1, "must be in [0, 1)")
_BETAS: dict[str, Rule] = {
    "betas": (lambda v: _is_list(v) and len(v) == 2 and all(is_number(b) and 0 <= b < 1 for b in v),
              "must be two numbers in [0, 1)"),
    "eps": (lambda v: is_number(v) and v >= 0, "must be a number >= 0"),
}
_TRUST_CAP: Rule = (lambda v: v is None or (is_number(v) and v > 0), "must be a positive number, or null for no cap")
OPTIM_BY_NAME: dict[str, dict[str, Rule]] = {  # an optimizer's own keys
    "sgd": {"momentum": _MOMENTUM},
    "adamw": _BETAS,
    "lamb": {**_BETAS, "trust_cap": _TRUST_CAP},
    "lars": {
        "momentum": _MOMENTUM,
        "trust_cap": _TRUST_CAP,
        "trust_coefficient": (lambda v: is_number(v) and v > 0, "must be a positive number"),
        "denominator": (lambda v: v in ("grad", "update"), "must be grad (‖g‖ + β‖w‖) or update (‖g + βw‖)"),
    },
}


def check_optim(node) -> None:
    name = node.get("name")
    if name not in OPTIMIZERS:
        raise ConfigError("optim.name", f"must be one of {', '.join(OPTIMIZERS)}", name)
    apply("optim", node, OPTIM)
    decay = decay_of(node)
    if decay not in DECAY[name]:
        raise ConfigError("optim.decay", f"{name} supports {' or '.join(DECAY[name])} weight decay", decay)
    if name == "sgd" and node.get("nesterov") and not node.get("momentum"):
        raise ConfigError("optim.nesterov", "needs optim.momentum > 0", node.nesterov)
    apply("optim", node, OPTIM_BY_NAME[name])


# --------------------------------------------------------------------------------------------- scaling

def check_scaling(node) -> None:
    if node.rule not in SCALING_RULES:
        raise ConfigError("scaling.rule", f"must be one of {', '.join(SCALING_RULES)}", node.rule)
    if not is_number(node.base_lr) or node.base_lr <= 0:
        raise ConfigError("scaling.base_lr", "must be a positive number", node.base_lr)
    if node.rule == "none":
        return
    if OmegaConf.is_missing(node, "base_batch") or node.base_batch is None:
        raise ConfigError("scaling.base_batch", f"rule {node.rule} needs the global batch the base lr was tuned at")
    if not is_whole(node.base_batch) or node.base_batch <= 0:
        raise ConfigError("scaling.base_batch", "must be a positive whole number", node.base_batch)
    if node.rule == "power" and not is_number(node.exponent):
        raise ConfigError("scaling.exponent", "must be a number", node.exponent)


# -------------------------------------------------------------------------------------------- schedule

_FRACTION_OF_PEAK: Rule = (lambda v: is_number(v) and 0 <= v <= 1, "must be a fraction of the peak rate in [0, 1]")
SCHEDULE: dict[str, Rule] = {
    "total_steps": (lambda v: v is None or (is_whole(v) and v >= 1), "must be null (= train.steps) or a whole number >= 1"),
    "warmup_epochs": (lambda v: v is None or (is_number(v) and v >= 0), "must be a number >= 0"),
    "warmup_steps": (lambda v: v is None or (is_whole(v) and v >= 0), "must be a whole number >= 0"),
    "warmup_start": _FRACTION_OF_PEAK,
}
SCHEDULE_BY_NAME: dict[str, dict[str, Rule]] = {  # a shape's own keys
    "cosine": {"final_factor": _FRACTION_OF_PEAK},
    "polynomial": {"final_factor": _FRACTION_OF_PEAK, "power": (lambda v: is_number(v) and v > 0, "must be a positive number")},
    "step": {"gamma": (lambda v: is_number(v) and 0 < v <= 1, "must be a factor in (0, 1]")},
}


def check_schedule(node, horizon: int) -> None:
    """The `schedule` group against the steps it spans (`horizon`), before the run length in epochs is known."""
    name = node.get("name")
    if name not in SHAPES:
        raise ConfigError("schedule.name", f"must be one of {', '.join(SHAPES)}", name)
    if node.get("warmup_epochs") is not None and node.get("warmup_steps"):
        raise ConfigError("schedule.warmup_epochs", "set warmup_steps or warmup_epochs, not both", node.warmup_epochs)
    apply("schedule", node, SCHEDULE)
    if node.get("warmup_epochs") is None and node.get("warmup_steps") is not None:
        check_warmup(node.warmup_steps, horizon)
    apply("schedule", node, SCHEDULE_BY_NAME.get(name, {}))
    if name == "step":
        check_milestones(node.get("milestones"), horizon)


def check_milestones(values, horizon: int) -> None:
    values = list(values or [])
    whole = all(is_whole(m) for m in values)
    fractions = all(is_number(m) and not is_whole(m) and 0 < m < 1 for m in values)
    if not (whole or fractions):
        raise ConfigError("schedule.milestones", "must be all step numbers or all fractions in (0, 1)", values)
    if whole and any(m < 0 or m > horizon for m in values):
        raise ConfigError("schedule.milestones", f"step numbers must lie in 0..train.steps={horizon}", values)


def check_recipe(cfg, horizon: int | None = None) -> None:
    """The optim, scaling and schedule groups; `horizon`: the schedule's length in steps when
    it is not the rehearsal's (the real job's)."""
    check_optim(cfg.optim)
    check_scaling(cfg.scaling)
    check_schedule(cfg.schedule, horizon_of(cfg.schedule, cfg.train.steps) if horizon is None else horizon)


# ------------------------------------------------------------------------------------------------ sync

SYNC: dict[str, Rule] = {
    "name": (lambda v: v in COMPRESSORS, f"must be one of {', '.join(COMPRESSORS)}"),
    "error_feedback": TRUE_OR_FALSE,
    "fidelity": TRUE_OR_FALSE,
    "bitwise": TRUE_OR_FALSE,
    "unbiased": TRUE_OR_FALSE,
    "bucket_kib": (lambda v: is_number(v) and v > 0, "must be a number > 0"),
    "fraction": (lambda v: is_number(v) and 0 < v <= 1, "must be in (0, 1]"),
    "count": (lambda v: v is None or (is_whole(v) and v >= 1), "must be null or a whole number >= 1"),
    "levels": (_whole_at_least(1), "must be a whole number >= 1"),
    "rank": (_whole_at_least(1), "must be a whole number >= 1"),
    "exact_until": (_whole_at_least(0), "must be a whole number >= 0"),
    "min_saving": (lambda v: is_number(v) and v > 0, "must be a number > 0"),
}


def check_sync(node) -> None:
    """The `sync` group; keys not given are not checked (they take their compressor's defaults)."""
    for key in node.keys():
        if key not in SYNC_KEYS:
            raise ConfigError(f"sync.{key}", f"unknown key; known: {', '.join(SYNC_KEYS)}", key)
    apply("sync", node, SYNC)


# ------------------------------------------------------------------------------------------- telemetry

TELEMETRY: dict[str, Rule] = {
    "layer_every": (_whole_at_least(0), "must be a whole number of at least 0"),
    "flush_every": (_whole_at_least(1), "must be a whole number of at least 1"),
    "noise_every": (_whole_at_least(0), "must be a whole number of at least 0"),
    "noise_workers": (_whole_at_least(0), "must be a whole number of at least 0 (0 = every worker)"),
    "blame": TRUE_OR_FALSE,
    "tensorboard": TRUE_OR_FALSE,
    "noise_decay": (lambda v: is_number(v) and 0.0 <= v < 1.0, "must be a number in [0, 1)"),
    "detect.nonfinite": TRUE_OR_FALSE,
    "detect.spike_z": (lambda v: v is None or (_finite(v) and v > 0), "must be a positive number, or null to turn spikes off"),
    "detect.spike_ratio": (lambda v: _finite(v) and v >= 1, "must be a number >= 1 (1 = no relative floor)"),
    "detect.spike_share": (lambda v: _finite(v) and 0 <= v <= 1, "must be a number in [0, 1] (0 = no such floor)"),
    "detect.initial_factor": (lambda v: v is None or (_finite(v) and v > 1), "must be a number above 1, or null to turn it off"),
    "detect.grad_factor": (lambda v: v is None or (_finite(v) and v > 1), "must be a number above 1, or null to turn it off"),
    "detect.min_history": (_whole_at_least(3), "must be a whole number of at least 3"),
    "detect.skip_storm": (lambda v: v is None or (is_whole(v) and v >= 1),
                          "must be a whole number of at least 1, or null to turn it off"),
    "detect.scale_floor": (lambda v: v is None or (_finite(v) and v > 0), "must be a positive number, or null to turn it off"),
    "on_trigger": (lambda v: v in ("stop", "continue"), "must be stop or continue"),
    "incident.steps": (_whole_at_least(1), "must be a whole number of at least 1"),
    "incident.factor": (lambda v: _finite(v) and v > 1, "must be a number above 1"),
}


def _over(defaults: dict, given) -> dict:
    """`given` (a node or dict, possibly partial, None for nothing) over `defaults`, as plain dicts."""
    given = OmegaConf.to_container(given) if isinstance(given, DictConfig) else dict(given or {})
    out = dict(defaults)
    for key, value in given.items():
        out[key] = _over(defaults[key], value) if isinstance(defaults.get(key), dict) else value
    return out


def check_telemetry(node) -> None:
    """The `telemetry` group; keys not given take their defaults (telemetry/settings.py)."""
    defaults = asdict(TELEMETRY_DEFAULTS)
    unknown = sorted(set((node or {}).get("detect") or {}) - set(defaults["detect"]))
    if unknown:
        raise ConfigError(f"telemetry.detect.{unknown[0]}", f"unknown key; known: {', '.join(defaults['detect'])}")
    t = _over(defaults, node)
    apply("telemetry", t, TELEMETRY)
    d = t["detect"]
    if not (is_whole(d["spike_window"]) and d["spike_window"] >= d["min_history"]):
        raise ConfigError("telemetry.detect.spike_window",
                          f"must be a whole number no smaller than telemetry.detect.min_history={d['min_history']}",
                          d["spike_window"])  # fmt: skip
    storm = d["skip_storm"] or 1
    if not (is_whole(d["skip_window"]) and d["skip_window"] >= storm):
        raise ConfigError("telemetry.detect.skip_window",
                          f"must be a whole number no smaller than telemetry.detect.skip_storm={storm}", d["skip_window"])


# ------------------------------------------------------------------------------------------------- job

JOB: dict[str, Rule] = {
    "dataset_size": (lambda v: v is None or is_whole(v) and v >= 1, "must be null or a whole number >= 1"),
    "steps": (lambda v: v is None or is_whole(v) and v >= 1, "must be null or a whole number >= 1"),
    "baseline.batch": (lambda v: v is None or is_whole(v) and v >= 1, "must be null or a whole number >= 1"),
    "baseline.devices": (lambda v: v is None or is_whole(v) and v >= 1, "must be null or a whole number >= 1"),
    "epochs": (lambda v: v is None or is_number(v) and v > 0, "must be null or a number of passes > 0"),
}
JOB_KEYS = ("baseline", "dataset_size", "epochs", "steps")


def check_job(node) -> None:
    """The `job` group (None or a missing group: nothing described, nothing to check)."""
    if node is None:
        return
    unknown = sorted(set(node) - set(JOB_KEYS))
    if unknown:
        raise ConfigError(f"job.{unknown[0]}", f"is not a job setting (known: {', '.join(JOB_KEYS)})")
    apply("job", node, JOB)
    size, epochs, steps = node.get("dataset_size"), node.get("epochs"), node.get("steps")
    base = node.get("baseline") or {}
    batch, devices = base.get("batch"), base.get("devices")
    if epochs is not None and steps is not None:
        raise ConfigError("job.steps", "set job.epochs or job.steps, not both", steps)
    if size is not None and epochs is None and steps is None:
        raise ConfigError("job.epochs", "the real job needs a length with job.dataset_size: set job.epochs or job.steps")
    if epochs is not None and size is None:
        raise ConfigError("job.dataset_size", "is needed to turn job.epochs into steps", None)
    if devices is not None and batch is None:
        raise ConfigError("job.baseline.batch", "is needed with job.baseline.devices", None)
    if batch is not None and devices is None:
        raise ConfigError("job.baseline.devices", "is needed with job.baseline.batch", None)


# ----------------------------------------------------------------------------------------------- check

CHECK: dict[str, Rule] = {
    "steps": (_whole_at_least(1), "must be a whole number >= 1"),
    "tolerance_scale": (lambda v: is_number(v) and v > 0, "must be a number > 0"),
    "batchnorm": (lambda v: v in BATCHNORM, f"must be one of {', '.join(BATCHNORM)}"),
    "step": (lambda v: v is None or (isinstance(v, (dict, DictConfig)) and isinstance(v.get("_target_"), str)),
             "must be null or a node with a _target_ naming your step function"),
}


def _names(allowed: tuple[str, ...]) -> Rule:
    return (lambda v: _is_list(v) and bool(v) and all(x in allowed for x in v), f"must be a non-empty list of {', '.join(allowed)}")


def check_check(cfg) -> None:
    """The `check` verb's own group, and the exact averaging it compares against."""
    node = cfg.get("check")
    if node is None:
        raise ConfigError("check", "missing; use the check config (scaledrill/conf/check.yaml)")
    apply("check", node, CHECK)
    if cfg.sync.name != "exact":
        raise ConfigError("sync.name", "check compares exact averaging with the true batch; a lossy compressor never matches it", cfg.sync.name)
    apply("check", node, {"paths": _names(CHECK_PATHS), "backends": _names(CHECK_BACKENDS)})


# ----------------------------------------------------------------------------------------- replay, adopt

def check_replay(node) -> None:
    """The `replay` keys that stand alone (replay.steps is judged against the checkpoint's step, in commands/replay.py)."""
    if OmegaConf.is_missing(node, "from") or node.get("from") is None:
        raise ConfigError("replay.from", "is required: a checkpoint file or a run directory")
    apply("replay", node, {"departure_rtol": (lambda v: is_number(v) and v >= 0, "must be a number >= 0")})
    variants = node.get("variants")
    for name, value in (OmegaConf.to_container(variants, resolve=True) if variants is not None else {}).items():
        key = f"replay.variants.{name}"
        if not VARIANT_NAME.match(str(name)) or name == "original":
            raise ConfigError(key, "a variant name is letters, digits, - or _, and not 'original' (that one is always run)", name)
        items = shlex.split(value) if isinstance(value, str) else value
        if not isinstance(items, list) or not all(isinstance(s, str) and ("=" in s or s.startswith("~")) for s in items):
            raise ConfigError(key, "must be a list of overrides like schedule.warmup_steps=50", value)
        if any(s.split("=")[0].lstrip("+~") in ("resume", "train.steps") for s in items):
            raise ConfigError(key, "resume and train.steps are set by the replay (replay.from, replay.steps)", value)


VARIANT_NAME = re.compile(r"^[A-Za-z0-9_-]+$")  # replay.variants.<name>


def check_forecast_batches(batches) -> None:
    """`batches` of `scaledrill forecast` when no ladder or job gives them."""
    if not isinstance(batches, list) or not batches or not all(is_whole(b) and b >= 1 for b in batches):
        raise ConfigError("batches", "must be a non-empty list of whole global batches >= 1", batches)


def check_adopt(node) -> None:
    if OmegaConf.is_missing(node, "from") or not node.get("from"):
        raise ConfigError("adopt.from", "is required: the checkpoint file to adopt")
    step = None if OmegaConf.is_missing(node, "step") else node.get("step")
    if not (is_whole(step) and step >= 0):
        raise ConfigError("adopt.step", "must be the whole number of optimizer steps the checkpoint was taken after", step)


def check_adopted_length(step: int, train) -> None:
    """The adopted run continues from adopt.step, so train.steps must lie past it."""
    if step >= train.steps:
        raise ConfigError("train.steps", f"must exceed adopt.step={step}: the run continues from there", train.steps)


# ---------------------------------------------------------------------------------------------- ladder

GROWTHS = ("workers", "accum")  # ladder.grow: which factor of B = W·b·k grows
TRAIN_LOSS = "train_loss"  # the goal metric that reads the step's training loss instead of an evaluation
PRUNERS = ("halving", "hyperband")  # ladder.search.pruner
_WHOLE_OR_NULL: Rule = (lambda v: v is None or (is_whole(v) and v >= 1), "must be a positive whole number or null")
LADDER: dict[str, Rule] = {
    "grow": (lambda v: v in GROWTHS, f"must be one of {', '.join(GROWTHS)}"),
    "check_every": POSITIVE_WHOLE,
    "parallel": POSITIVE_WHOLE,
    "batches": (lambda v: v is None or (_is_list(v) and bool(v) and all(is_whole(b) and b >= 1 for b in v)),
                "must be a non-empty list of positive whole numbers"),
    "max_steps": _WHOLE_OR_NULL,
    "max_samples": _WHOLE_OR_NULL,
}
GOAL: dict[str, Rule] = {
    "metric": (lambda v: isinstance(v, str) and bool(v), f"must name an evaluation metric (loss, accuracy) or {TRAIN_LOSS}"),
    "value": (lambda v: v is None or _finite(v), "must be a finite number or null"),
    "reached_when": (lambda v: v in ("below", "above"), "must be below or above"),
}


def check_goal(node, prefix: str = "ladder.goal") -> None:
    """A goal (`ladder.goal`, or the task's own `task.goal`), named by `prefix`."""
    apply(prefix, node, GOAL)


def check_ladder(cfg) -> None:
    """The `ladder` keys (the rungs they lead to are checked as runs, in ladder/rungs.py)."""
    node = cfg.ladder
    apply("ladder", node, {"grow": LADDER["grow"]})
    check_goal(node.goal)
    apply("ladder", node, LADDER)
    batches = node.get("batches")
    if batches is None:
        apply("ladder", node, {"rungs": POSITIVE_WHOLE})
    elif len(set(batches)) != len(batches):
        raise ConfigError("ladder.batches", "must not repeat a batch size", list(batches))


LADDER_SEARCH: dict[str, Rule] = {
    "pruner": (lambda v: v in PRUNERS, f"must be one of {', '.join(PRUNERS)}"),
    "lo": (lambda v: is_number(v) and v > 0, "must be a positive number"),
    "hi": (lambda v: is_number(v) and v > 0, "must be a positive number"),
    "warmup_max": (_whole_at_least(0), "must be a whole number >= 0"),
    "reduction": (_whole_at_least(1), "must be a positive whole number"),
    "seed": (is_whole, "must be a whole number"),
    "storage": (lambda v: v is None or (isinstance(v, str) and bool(v)), "must be null, a journal file path or a database URL"),
    "study": (lambda v: isinstance(v, str) and bool(v.strip()), "must be a non-empty name"),
    "trials": (_whole_at_least(1), "must be a positive whole number"),
    "min_steps": (lambda v: v is None or (is_whole(v) and v >= 1), "must be a positive whole number"),
    "explode": (lambda v: v is None or (is_number(v) and v > 0), "must be a positive number"),
}


def check_search(node) -> None:
    """The `ladder.search` keys (whether a journal file's directory exists is the file system's: ladder/search.py)."""
    apply("ladder.search", node, LADDER_SEARCH)
    if node.lo >= node.hi:
        raise ConfigError("ladder.search.hi", f"must exceed ladder.search.lo={node.lo}", node.hi)
    if node.reduction < 2:
        raise ConfigError("ladder.search.reduction", "must be at least 2", node.reduction)
