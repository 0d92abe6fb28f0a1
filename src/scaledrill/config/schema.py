"""The keys of a run, their types and defaults: one dataclass per config group.

These dataclasses are the single source of every default (those of optim, sync and
telemetry live beside their code, in <part>/settings.py, which fills them in for callers
that pass only some keys); the YAML files in
`scaledrill/conf` hold only what a preset changes (`defaults: [base_sgd, _self_]`
takes the schema, then the file's own values). Hydra refuses a key a dataclass
does not declare, so a misspelt key fails at composition (cli.py words the error);
the project's own rules on the values (ranges, one-of, divisibility, cross-key) live
in config/rules.py, which config/validate.py applies. Groups whose options carry different keys (optim,
schedule, sync) get one dataclass per option, all from a shared base.
"""

from dataclasses import dataclass, field
from typing import Any, Optional

from omegaconf import MISSING

from scaledrill.optim.settings import AdamwConfig, LambConfig, LarsConfig, SgdConfig
from scaledrill.sync.settings import PowersgdConfig, QsgdConfig, RandkConfig, SignConfig, SyncConfig, TopkConfig
from scaledrill.telemetry.settings import TelemetryConfig


@dataclass
class LayoutConfig:
    """W simulated workers on P processes; global batch B = workers * micro_batch * accum."""

    workers: int = 8
    procs: int = 1
    micro_batch: int = 16
    accum: int = 1
    backend: str = "local"  # local | gloo | mpi
    address: str = "127.0.0.1"  # rendezvous address of the gloo processes; loopback unless you need another
    port: Optional[int] = None  # rendezvous port; null = a free one
    mpiexec: Optional[str] = None  # path of mpiexec for backend=mpi; null = the one beside this Python, then PATH


@dataclass
class ScalerConfig:
    """Dynamic loss scaling (fp16): skip a step whose gradient overflowed and shrink the scale (common practice)."""

    start: float = 65536.0  # the first scale
    grow: float = 2.0  # multiply the scale by this after `patience` clean steps in a row
    shrink: float = 0.5  # multiply it by this after an overflow
    patience: int = 2000  # clean steps before the scale grows


@dataclass
class TorchSamplerConfig:
    """train.order=torch_distributed: worker w sees what rank w of DistributedSampler(W, w, ...) yields."""

    shuffle: bool = True
    seed: int = 0
    drop_last: bool = False


@dataclass
class TrainConfig:
    steps: int = 200  # optimizer steps
    seed: int = 0
    eval_every: int = 50  # steps between evaluations; 0 = only at the end
    tail: str = "drop"  # epoch tail that does not fill a global batch: drop | carry
    order: str = "layout"  # layout (each step's global batch from one permutation; any P) | torch_distributed (tasks/torch_order.py)
    torch_sampler: TorchSamplerConfig = field(default_factory=TorchSamplerConfig)
    checkpoint_every: int = 0  # steps between checkpoints; 0 = only at the end
    grads: str = "auto"  # auto | fused | vmap | loop
    dtype: str = "float32"  # float32 | float64: the master weights, their gradients and the optimizer state
    precision: str = "fp32"  # fp32 | bf16 | fp16: forward and loss under torch.autocast (mixed precision)
    accum_dtype: str = "fp32"  # fp32 | bf16 | fp16: what the micro-batch gradients are summed in (16 bits loses small ones)
    loss_scale: Any = "dynamic"  # dynamic | none | a number: loss scaling; dynamic applies to fp16 only (bf16 needs none)
    scaler: ScalerConfig = field(default_factory=ScalerConfig)
    batchnorm: str = "worker"  # BatchNorm statistics per worker | global (all W·b samples of the micro-step; fused path only)
    convert_batchnorm: bool = True  # stock BatchNorm1d/2d/3d/SyncBatchNorm of the model become per-worker GhostBatchNorm
    timeout_s: float = 60  # how long a collective waits for a peer before the run fails
    progress: bool = True


@dataclass
class TaskConfig:
    """A task is open: model, data and loss are `_target_` dicts of the user's own classes."""

    name: str = "custom"
    model: Any = MISSING
    data: Any = MISSING
    loss: Any = MISSING
    goal: Any = None  # when the task counts as trained: {metric, value, reached_when} (the ladder's default goal)


@dataclass
class ScalingConfig:
    rule: str = "none"  # none | linear | sqrt | power
    base_batch: Optional[int] = None  # the global batch base_lr was tuned at
    base_lr: float = "${optim.lr}"  # type: ignore[assignment]  (an interpolation until resolved)
    exponent: float = 1.0


@dataclass
class ScheduleConfig:
    name: str = "constant"
    warmup_steps: int = 0  # or set warmup_epochs instead
    warmup_epochs: Optional[float] = None
    warmup_start: float = 0.0  # factor of the peak rate at step 0
    total_steps: Optional[int] = None  # the schedule's horizon; null = train.steps


@dataclass
class CosineConfig(ScheduleConfig):
    name: str = "cosine"
    final_factor: float = 0.0


@dataclass
class PolynomialConfig(CosineConfig):
    name: str = "polynomial"
    power: float = 2.0


@dataclass
class StepConfig(ScheduleConfig):
    name: str = "step"
    milestones: list[Any] = field(default_factory=lambda: [0.33, 0.67, 0.89])  # step numbers, or fractions of train.steps
    gamma: float = 0.1


@dataclass
class BaselineConfig:
    batch: Optional[int] = None  # the global batch the recipe is moved from
    devices: Optional[int] = None  # the devices it ran on


@dataclass
class JobConfig:
    """The real job the rehearsal stands in for (optim/job.py); null = not described."""

    dataset_size: Optional[int] = None  # training samples of the real dataset
    epochs: Optional[float] = None  # passes over it (or set steps)
    steps: Optional[int] = None  # optimizer steps of the real run (instead of epochs)
    baseline: BaselineConfig = field(default_factory=BaselineConfig)


@dataclass
class RunConfig:
    """The root of `scaledrill run` (and of every verb that trains: recipe, check, replay, ladder)."""

    layout: Any = MISSING
    task: Any = MISSING
    optim: Any = MISSING
    scaling: Any = MISSING
    schedule: Any = MISSING
    sync: Any = MISSING
    telemetry: Any = MISSING
    train: TrainConfig = field(default_factory=TrainConfig)
    job: Any = MISSING  # the real job this rehearses (`job=imagenet`, conf/job/)
    resume: Optional[str] = None  # path of a checkpoint to continue from
    debug: bool = False  # show Python tracebacks on errors


# group -> {name in the ConfigStore: dataclass}; a group's YAML option names one of these in its defaults list
GROUPS = {
    "layout": {"base_layout": LayoutConfig},
    "task": {"base_task": TaskConfig},
    "optim": {"base_sgd": SgdConfig, "base_adamw": AdamwConfig, "base_lamb": LambConfig, "base_lars": LarsConfig},
    "scaling": {"base_scaling": ScalingConfig},
    "schedule": {"base_constant": ScheduleConfig, "base_cosine": CosineConfig, "base_polynomial": PolynomialConfig,
                 "base_step": StepConfig},
    "sync": {"base_exact": SyncConfig, "base_sign": SignConfig, "base_topk": TopkConfig, "base_randk": RandkConfig,
             "base_qsgd": QsgdConfig, "base_powersgd": PowersgdConfig},
    "telemetry": {"base_telemetry": TelemetryConfig},
    "job": {"base_job": JobConfig},
}
