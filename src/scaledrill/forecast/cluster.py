"""The cluster a forecast describes, read and checked from config group `forecast`.

Why: a forecast is only as good as its description of the machine, so every
number is checked before anything is computed, and a bad one fails with the
dotted key and the rule it broke.

Units: bandwidth in GB/s with 1 GB = 10⁹ bytes, so β = 1 / (GB/s · 10⁹) seconds
per byte; latency in microseconds, so α = µs · 10⁻⁶ seconds. `peak_tflops` is one
device's peak, per precision ({fp32: .., bf16: .., fp16: ..}; devices reach several
times their fp32 peak in 16 bits), and `precision` picks the one the run trains in
(a single number is taken as the peak of every precision); `inter_bandwidth_gbps` is what one device gets across nodes (its
share of the node's network), which is what the two-level model needs.
"""

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass

from scaledrill.errors import ConfigError, is_number, is_whole
from scaledrill.forecast.collectives import ALGORITHMS

CLUSTER_KEYS = (
    "devices", "devices_per_node", "peak_tflops", "utilization",
    "intra_bandwidth_gbps", "intra_latency_us", "inter_bandwidth_gbps", "inter_latency_us",
    "algorithm", "overlap", "price_per_device_hour",
)  # fmt: skip
INPUT_KEYS = ("precision", "flops_per_sample", "grad_bytes", "compression_ratio", "ladder", "run")
MODEL_KEYS = ("model", "sample_shape", "sample_dtype")  # the real model, counted on the meta device (model.py)


def _key(name: str) -> str:
    return f"forecast.{name}"


def _count(name: str, value) -> int:
    if not is_whole(value) or value < 1:
        raise ConfigError(_key(name), "must be a positive whole number", value)
    return value


def _number(name: str, value, rule: str, ok) -> float:
    if not is_number(value) or not math.isfinite(value) or not ok(value):
        raise ConfigError(_key(name), rule, value)
    return float(value)


@dataclass(frozen=True)
class Cluster:
    devices: int
    devices_per_node: int
    peak_tflops: float  # per device
    utilization: float  # share of peak the model reaches, (0, 1]
    intra_bandwidth_gbps: float
    intra_latency_us: float
    inter_bandwidth_gbps: float  # per device, across nodes
    inter_latency_us: float
    algorithm: str
    overlap: float  # share of the all-reduce that can hide behind the backward, [0, 1]
    price_per_device_hour: float
    precision: str = "fp32"  # the precision peak_tflops was taken for

    def __post_init__(self):
        _count("devices", self.devices)
        _count("devices_per_node", self.devices_per_node)
        if self.devices % self.devices_per_node:
            raise ConfigError(
                _key("devices"), f"must be a multiple of forecast.devices_per_node={self.devices_per_node}", self.devices
            )
        positive, non_negative = "must be a finite number > 0", "must be a finite number >= 0"
        _number("peak_tflops", self.peak_tflops, positive, lambda v: v > 0)
        _number("utilization", self.utilization, "must lie in (0, 1]", lambda v: 0 < v <= 1)
        for link in ("intra", "inter"):
            _number(f"{link}_bandwidth_gbps", getattr(self, f"{link}_bandwidth_gbps"), positive, lambda v: v > 0)
            _number(f"{link}_latency_us", getattr(self, f"{link}_latency_us"), non_negative, lambda v: v >= 0)
        _number("overlap", self.overlap, "must lie in [0, 1]", lambda v: 0 <= v <= 1)
        _number("price_per_device_hour", self.price_per_device_hour, non_negative, lambda v: v >= 0)
        if self.algorithm not in ALGORITHMS:
            raise ConfigError(_key("algorithm"), f"must be one of {', '.join(ALGORITHMS)}", self.algorithm)

    @property
    def nodes(self) -> int:
        return self.devices // self.devices_per_node

    @property
    def intra(self) -> tuple[float, float]:
        """(α seconds, β seconds per byte) of the link inside a node."""
        return self.intra_latency_us * 1e-6, 1.0 / (self.intra_bandwidth_gbps * 1e9)

    @property
    def inter(self) -> tuple[float, float]:
        """(α seconds, β seconds per byte) of the link across nodes."""
        return self.inter_latency_us * 1e-6, 1.0 / (self.inter_bandwidth_gbps * 1e9)

    @property
    def flat_link(self) -> tuple[float, float]:
        """Link a flat (one-level) algorithm runs at: the slowest one it crosses,
        which is the inter-node link as soon as there is more than one node."""
        return self.inter if self.nodes > 1 else self.intra

    def describe(self) -> dict:
        return asdict(self) | {"nodes": self.nodes}


def validate(node: Mapping) -> Cluster:
    """Check the whole `forecast` group and return its Cluster.

    Also checks the optional inputs: `flops_per_sample` and `grad_bytes` (null =
    measured from the model), `compression_ratio` (null = 1 or a run's summary),
    `ladder` and `run` (null or a path); `model`, `sample_shape` and `sample_dtype`
    are checked when the model is counted (model.py). Unknown keys are rejected, since a typo
    would otherwise silently leave a default in place.
    """
    unknown = sorted(set(node) - set(CLUSTER_KEYS) - set(INPUT_KEYS) - set(MODEL_KEYS))
    if unknown:
        raise ConfigError(_key(unknown[0]), "is not a forecast setting", None)
    values = {}
    for name in CLUSTER_KEYS + INPUT_KEYS:
        try:
            values[name] = node[name] if name in node else None
        except Exception as exc:  # OmegaConf's '???' raises on access
            raise ConfigError(_key(name), f"is required ({exc.__class__.__name__})", None) from None
        if name in CLUSTER_KEYS and values[name] is None:
            raise ConfigError(_key(name), "is required", None)
    for name, rule in (("flops_per_sample", "must be null or > 0"), ("grad_bytes", "must be null or > 0"),
                       ("compression_ratio", "must be null or > 0")):  # fmt: skip
        if values[name] is not None:
            _number(name, values[name], rule, lambda v: v > 0)
    for name in ("ladder", "run"):
        if values[name] is not None and not isinstance(values[name], str):
            raise ConfigError(_key(name), "must be null or a path", values[name])
    if node.get("model") is not None and node.get("sample_shape") is None:
        raise ConfigError(_key("sample_shape"), "is needed with forecast.model: the shape of one sample", None)
    precision = values["precision"] or "fp32"
    values["peak_tflops"] = peak_of(values["peak_tflops"], precision)
    return Cluster(**{name: values[name] for name in CLUSTER_KEYS}, precision=precision)


PRECISIONS = ("fp32", "bf16", "fp16")


def peak_of(peak, precision: str):
    """One device's peak TFLOP/s in `precision`, from a number or a per-precision mapping."""
    if precision not in PRECISIONS:
        raise ConfigError(_key("precision"), f"must be one of {', '.join(PRECISIONS)}", precision)
    if not isinstance(peak, Mapping):
        return peak  # one number: the peak of every precision (older cluster descriptions)
    unknown = sorted(set(peak) - set(PRECISIONS))
    if unknown:
        raise ConfigError(_key(f"peak_tflops.{unknown[0]}"), f"is not a precision; give peaks for {', '.join(PRECISIONS)}", None)
    if peak.get(precision) is None:
        raise ConfigError(
            _key("peak_tflops"), f"has no peak for forecast.precision={precision}; add forecast.peak_tflops.{precision}", dict(peak)
        )
    return peak[precision]
