"""The keys of the `sync` group, their types and defaults: one dataclass per compressor.

The config group's schema (registered by scaledrill.config.store) and the defaults
`build_sync` fills in when a caller passes only some keys, from one place.
"""

from dataclasses import dataclass, fields
from typing import Optional

from omegaconf import DictConfig, OmegaConf


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


VARIANTS = {c.name: c for c in (SyncConfig, SignConfig, TopkConfig, RandkConfig, QsgdConfig, PowersgdConfig)}
VARIANTS.update(fp16=SyncConfig, bf16=SyncConfig)  # casts take the base keys only
KEYS = tuple(dict.fromkeys(f.name for c in VARIANTS.values() for f in fields(c)))  # every key some compressor takes


def settings_of(cfg) -> DictConfig:
    """`cfg` (a `sync` node or dict, possibly partial) over the defaults of its compressor's
    schema; keys that compressor does not take are left out. Call after config/rules.py's `check_sync`."""
    given = OmegaConf.to_container(cfg) if isinstance(cfg, DictConfig) else dict(cfg)
    kind = VARIANTS[given.get("name", SyncConfig.name)]
    known = {f.name for f in fields(kind)}
    return OmegaConf.merge(OmegaConf.structured(kind), {k: v for k, v in given.items() if k in known})
