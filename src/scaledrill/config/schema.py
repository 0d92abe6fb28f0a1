"""The keys of a run, their types and defaults: one dataclass per config group.

These dataclasses are the single source of every default; the YAML files in
`scaledrill/conf` hold only what a preset changes (`defaults: [base_sgd, _self_]`
takes the schema, then the file's own values). Hydra refuses a key a dataclass
does not declare, so a misspelt key fails at composition (cli.py words the error);
the project's own rules (ranges, one-of, divisibility) live in config/rules.py and
the `validate` of each part. Groups whose options carry different keys (optim,
schedule, sync) get one dataclass per option, all from a shared base.
"""

from dataclasses import dataclass, field
from typing import Any, Optional

from omegaconf import MISSING


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
class TrainConfig:
    steps: int = 200  # optimizer steps
    seed: int = 0
    eval_every: int = 50  # steps between evaluations; 0 = only at the end
    tail: str = "drop"  # epoch tail that does not fill a global batch: drop | carry
    checkpoint_every: int = 0  # steps between checkpoints; 0 = only at the end
    grads: str = "auto"  # auto | fused | vmap | loop
    dtype: str = "float32"  # float32 | float64
    batchnorm: str = "worker"  # BatchNorm statistics per worker | global (all W·b samples of the micro-step; fused path only)
    timeout_s: float = 60  # how long a collective waits for a peer before the run fails
    progress: bool = True


@dataclass
class TaskConfig:
    """A task is open: model, data and loss are `_target_` dicts of the user's own classes."""

    name: str = MISSING
    model: Any = MISSING
    data: Any = MISSING
    loss: Any = MISSING


@dataclass
class OptimConfig:
    name: str = MISSING
    lr: float = MISSING  # rate at scaling.base_batch; the scaling rule and schedule derive the rest
    weight_decay: float = 0.0
    decay: str = "coupled"  # coupled: L2 added to the gradient | decoupled: λw added to the update
    exclude: Optional[list[str]] = None  # null: no decay for parameters with <= 1 dimension; or a list of name patterns
    clip_norm: Optional[float] = None  # clip by global norm after averaging; null = off


@dataclass
class SgdConfig(OptimConfig):
    name: str = "sgd"
    lr: float = 0.1
    momentum: float = 0.9
    nesterov: bool = False


@dataclass
class AdamwConfig(OptimConfig):
    name: str = "adamw"
    lr: float = 0.001
    betas: list[float] = field(default_factory=lambda: [0.9, 0.999])
    eps: float = 1.0e-8
    weight_decay: float = 0.01
    decay: str = "decoupled"


@dataclass
class LambConfig(AdamwConfig):
    name: str = "lamb"
    eps: float = 1.0e-6
    bias_correction: bool = True
    trust_cap: Optional[float] = None  # optional cap on the trust ratio


@dataclass
class LarsConfig(OptimConfig):
    name: str = "lars"
    lr: float = 1.0  # each layer moves by lr · trust_coefficient · ‖w‖/‖g‖ of its gradient
    momentum: float = 0.9
    weight_decay: float = 0.0005
    trust_coefficient: float = 0.001  # η of the paper
    trust_cap: Optional[float] = None  # optional cap on the trust ratio
    denominator: str = "grad"  # grad: ‖g‖ + β‖w‖ (the paper) | update: ‖g + βw‖


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
class SyncConfig:
    name: str = "exact"
    error_feedback: bool = False
    # 16 MiB: in our benchmark (scripts/bench, README) the 8 MB gradient of a bucketed all-reduce kept 0.93 of
    # one raw all-reduce's throughput in one bucket and 0.63 with 1 MiB buckets (gloo's per-call latency); 16 MiB
    # keeps models of a few million parameters in a handful of calls while the first buckets can start early.
    bucket_kib: float = 16384
    fidelity: bool = True
    bitwise: bool = False  # true: sum along one fixed tree over worker ids, bitwise equal across layouts (sync/tree.py)


@dataclass
class SignConfig(SyncConfig):
    name: str = "sign"
    error_feedback: bool = True


@dataclass
class TopkConfig(SyncConfig):
    name: str = "topk"
    fraction: float = 0.01
    count: Optional[int] = None  # an absolute k instead of the fraction
    error_feedback: bool = True


@dataclass
class RandkConfig(SyncConfig):
    name: str = "randk"
    fraction: float = 0.01
    count: Optional[int] = None
    unbiased: bool = True


@dataclass
class QsgdConfig(SyncConfig):
    name: str = "qsgd"
    levels: int = 16


@dataclass
class PowersgdConfig(SyncConfig):
    name: str = "powersgd"
    rank: int = 2
    exact_until: int = 10  # steps of exact averaging before compression starts
    min_saving: float = 1.0  # compress a matrix only when it saves at least this factor: rows·cols > min_saving·rank·(rows+cols)
    error_feedback: bool = True


@dataclass
class DetectConfig:
    nonfinite: bool = True  # fire on a NaN or infinite loss or gradient norm
    spike_z: Optional[float] = 6.0  # robust sigmas (MAD x 1.4826) above the trailing median; null = off
    spike_window: int = 50  # trailing steps behind the median (loss spike and gradient explosion)
    min_history: int = 20  # steps seen before the spike and explosion checks start
    grad_factor: Optional[float] = 10.0  # gradient norm above this many times its trailing median; null = off


@dataclass
class IncidentConfig:
    steps: int = 20  # per-layer statistic records written into an incident file (the newest ones)
    factor: float = 3.0  # a layer trips when its update/weight ratio exceeds factor x the median of its earlier ratios


@dataclass
class TelemetryConfig:
    layer_every: int = 10  # steps between per-layer statistics (weight, gradient, update norms); 0 = never
    noise_decay: float = 0.95  # moving-average decay of the |G|^2 and tr(Sigma) estimates behind the noise scale
    flush_every: int = 50  # logged steps buffered before one commit to the run store
    detect: DetectConfig = field(default_factory=DetectConfig)
    on_trigger: str = "stop"  # stop | continue: what a firing detector does; an incident record is written either way
    incident: IncidentConfig = field(default_factory=IncidentConfig)
    noise_every: int = 25  # fused path: every this many steps measure the noise scale on the per-worker path; 0 = never
    tensorboard: bool = False  # also write TensorBoard event files to RUN_DIR/tensorboard


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
}
