"""The keys each verb adds to a run's configuration (check, ladder, replay) or has of its own
(forecast, report): their types and defaults, as config/schema.py does for the groups of a run."""

from dataclasses import dataclass, field
from typing import Any, Optional

from omegaconf import MISSING

from scaledrill.config.schema import RunConfig


@dataclass
class CheckConfig:
    steps: int = 5  # length of the parameter trajectory compared with the float64 reference
    paths: list[str] = field(default_factory=lambda: ["accumulation", "fused", "vmap", "loop", "processes"])
    backends: list[str] = field(default_factory=lambda: ["gloo", "mpi"])  # mpi only where mpi4py and mpiexec exist
    tolerance_scale: float = 1.0  # multiplies every tolerance; a tiny value forces a mismatch
    # worker: reference BatchNorm statistics per worker micro-batch (what the cluster does) | global: over the whole
    # global batch; the fused and process paths then train with train.batchnorm=global; needs layout.accum=1
    batchnorm: str = "worker"
    step: Any = None  # optional {_target_: module.function}: your own training step, see scaledrill.check.threads


@dataclass
class GoalConfig:
    metric: str = "loss"  # an evaluation metric of the task (loss, accuracy), or train_loss (the step's training loss)
    value: Optional[float] = None  # null: no target; every rung runs its whole budget
    reached_when: str = "below"  # below | above: which side of the value counts as reached


@dataclass
class SearchConfig:
    enabled: bool = False  # search the lr window at every rung (costs trials x steps per rung)
    trials: int = 12
    pruner: str = "halving"  # halving (successive halving) | hyperband
    reduction: int = 3  # eta: keep the best 1/eta of the trials at each pruning point
    min_steps: Optional[int] = None  # steps before the first pruning decision; null = ladder.check_every
    lo: float = 0.1  # sample lr log-uniformly in [lr*lo, lr*hi], lr = the rung's rate under the scaling rule
    hi: float = 10.0
    warmup_max: int = 0  # > 0: also search warmup steps in [0, warmup_max]
    explode: Optional[float] = 10.0  # a trial whose training loss exceeds this many times its first diverged; null = off
    seed: int = 0  # seed of the sampler: the same seed gives the same trials
    storage: Optional[str] = None  # where the trials live: null = in memory | a journal file path | a database URL
    study: str = "ladder"  # study name in the storage (one study per rung: NAME-B<batch>); processes sharing both share the search


@dataclass
class LadderConfig:
    grow: str = "workers"  # workers: keep layout.micro_batch, scale layout.workers | accum: keep the workers, scale layout.accum
    rungs: int = 5  # global batches B0·2^i, i = 0..rungs-1, with B0 = the layout's global batch
    batches: Optional[list[int]] = None  # or an explicit list of global batches, e.g. [256, 1024, 4096]
    goal: GoalConfig = field(default_factory=GoalConfig)
    check_every: int = 10  # steps between goal checks (each one an evaluation unless metric=train_loss)
    max_samples: Optional[int] = None  # sample budget per rung: steps = max_samples // B; null = no budget
    max_steps: Optional[int] = None  # cap on the steps of every rung; null = train.steps
    parallel: int = 1  # rungs trained at once, each in its own process; at most the cores
    search: SearchConfig = field(default_factory=SearchConfig)


@dataclass
class ReplayConfig:
    source: str = MISSING  # stored under the key `from` (a Python keyword): a checkpoint file, or a run directory
    variants: dict[str, Any] = field(default_factory=dict)  # name -> list of overrides added to the original's own
    steps: Optional[int] = None  # continue to this step; null = the original's train.steps
    cluster_log: Optional[str] = None  # optional CSV with columns step, loss (grad_norm, lr read if present)
    departure_rtol: float = 0.05  # the rehearsal departs from the cluster log where |loss - log| > rtol * |log|


def _key_named(cls, attribute: str, key: str):
    """Store dataclass field `attribute` under `key`, a name Python reserves (`from`)."""
    fields, hints = cls.__dataclass_fields__, cls.__annotations__
    spec = fields.pop(attribute)
    spec.name = key
    cls.__dataclass_fields__ = {key: spec, **fields}
    cls.__annotations__ = {key: hints.pop(attribute), **hints}
    setattr(cls, key, property(lambda self: getattr(self, attribute)))  # an instance's value under the key
    return cls


_key_named(ReplayConfig, "source", "from")


@dataclass
class AdoptConfig:
    source: str = MISSING  # stored under the key `from`: the checkpoint file (torch.save of a dict, or a bare state_dict)
    step: int = MISSING  # optimizer steps the job had taken when it saved the file
    model_key: Optional[str] = "model"  # the model's state_dict in the file; a bare state_dict file needs none
    optimizer_key: Optional[str] = "optimizer"  # torch optimizer state_dict; absent from the file = fresh; null = ignore it
    scheduler_key: Optional[str] = None  # a torch LR scheduler state_dict to check against the schedule keys
    cluster_log: Optional[str] = None  # optional CSV (step, loss[, grad_norm, lr]): rows before adopt.step go into run.sqlite


_key_named(AdoptConfig, "source", "from")


@dataclass
class CheckRoot(RunConfig):
    check: CheckConfig = field(default_factory=CheckConfig)


@dataclass
class LadderRoot(RunConfig):
    ladder: LadderConfig = field(default_factory=LadderConfig)


@dataclass
class ReplayRoot(RunConfig):
    replay: ReplayConfig = field(default_factory=ReplayConfig)


@dataclass
class AdoptRoot(RunConfig):
    adopt: AdoptConfig = field(default_factory=AdoptConfig)


@dataclass
class ClusterConfig:
    """The described cluster of `scaledrill forecast` (bandwidths in GB/s, 1 GB = 1e9 bytes; latencies in µs)."""

    devices: int = MISSING
    devices_per_node: int = MISSING
    precision: str = "fp32"  # fp32 | bf16 | fp16: what the run trains in (train.precision); picks the peak
    peak_tflops: Any = MISSING  # one device's peak: a number, or a mapping per precision {fp32: .., bf16: ..}
    utilization: float = MISSING  # share of peak the model reaches, (0, 1]
    intra_bandwidth_gbps: float = MISSING  # device to device inside a node
    intra_latency_us: float = MISSING
    inter_bandwidth_gbps: float = MISSING  # what one device gets across nodes
    inter_latency_us: float = MISSING
    algorithm: str = MISSING  # ring | recursive_doubling | rabenseifner | two_level
    overlap: float = MISSING  # share of the all-reduce that can hide behind the backward, [0, 1]
    price_per_device_hour: float = MISSING
    flops_per_sample: Optional[float] = None  # null = measured from the model
    grad_bytes: Optional[float] = None  # null = trainable parameter bytes of the model
    compression_ratio: Optional[float] = None  # null = 1, or the ratio a run's summary reports
    ladder: Optional[str] = None  # path to a ladder.json for steps-to-target per batch
    run: Optional[str] = None  # path to a run directory's summary.json
    model: Any = None  # the real model to count, e.g. {_target_: mypkg.Net, width: 64}; null = the task's model
    sample_shape: Optional[list[int]] = None  # one sample's shape without the batch dimension, e.g. [3, 224, 224]
    sample_dtype: str = "float32"  # the input's dtype: float32 | float16 | bfloat16 | int64 | int32 (token ids)


@dataclass
class ForecastRoot:
    forecast: Any = MISSING
    task: Any = MISSING
    job: Any = None  # the real job (conf/job/)
    batches: list[int] = field(default_factory=lambda: [256, 1024, 4096, 16384])  # projected when forecast.ladder is null
    debug: bool = False  # show Python tracebacks on errors


@dataclass
class ReportRoot:
    path: Any = MISSING  # a run, check, replay, ladder or forecast directory, one holding several, or a list of them
    out: Optional[str] = None  # null = PATH/report.html
    debug: bool = False  # show Python tracebacks on errors
