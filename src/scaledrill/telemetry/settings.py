"""The keys of the `telemetry` group, their types and defaults.

The config group's schema (registered by scaledrill.config.store) and the defaults the
checks here fall back on when a caller passes only some keys, from one place.
"""

from dataclasses import asdict, dataclass, field
from typing import Optional


@dataclass
class DetectConfig:
    nonfinite: bool = True  # fire on a NaN or infinite loss or gradient norm
    spike_z: Optional[float] = 6.0  # robust sigmas (MAD x 1.4826) above the trailing median; null = off
    spike_ratio: float = 2.0  # ...and also more than this many times that median (a floor for a nearly flat loss); 1 = no floor
    spike_share: float = 0.2  # ...and rise above it by this share of the fall from the run's first loss to that median; 0 = no floor
    spike_window: int = 50  # trailing steps behind the median (loss spike and gradient explosion)
    min_history: int = 20  # steps seen before the spike and explosion checks start
    grad_factor: Optional[float] = 10.0  # gradient norm above this many times its trailing median; null = off
    skip_storm: Optional[int] = 10  # fire when this many steps are skipped for an overflowed gradient (loss scaling) ...; null = off
    skip_window: int = 50  # ... within this many steps
    scale_floor: Optional[float] = 1.0  # fire when the loss scale falls below this; null = off
    initial_factor: Optional[float] = 3.0  # loss above this many times the median of the first three losses; null = off


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
    blame: bool = True  # when a detector fires, rerun the step per worker and name the outlier workers and samples
    on_trigger: str = "stop"  # stop | continue: what a firing detector does; an incident record is written either way
    incident: IncidentConfig = field(default_factory=IncidentConfig)
    noise_every: int = 25  # fused path: every this many steps measure the noise scale on the per-worker path; 0 = never
    noise_workers: int = 8  # a model only the loop path serves (recurrent layers): workers a noise step measures, drawn anew each time; 0 = all
    tensorboard: bool = False  # also write TensorBoard event files to RUN_DIR/tensorboard


DEFAULTS = TelemetryConfig()
DETECT_DEFAULTS = asdict(DetectConfig())
