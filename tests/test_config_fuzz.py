"""Fuzz the configuration checks: any value for any key gives a ConfigError naming a key,
or a valid configuration — never another exception (which would reach the user as a traceback)."""

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from omegaconf import OmegaConf

from conftest import make_config
from scaledrill.config.validate import validate_run
from scaledrill.errors import ConfigError

KEYS = [
    "layout.workers", "layout.procs", "layout.micro_batch", "layout.accum", "layout.backend",
    "train.steps", "train.seed", "train.eval_every", "train.tail", "train.grads", "train.dtype", "train.timeout_s",
    "optim.lr", "optim.momentum", "optim.weight_decay", "optim.clip_norm",
    "scaling.rule", "scaling.base_batch", "scaling.exponent", "schedule.warmup_steps", "schedule.name",
    "sync.name", "sync.fraction", "sync.bucket_kib", "telemetry.layer_every", "telemetry.noise_decay",
]
VALUES = st.one_of(
    st.none(), st.booleans(), st.integers(-10, 10**6), st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from(["", "local", "gloo", "mpi", "sgd", "lamb", "linear", "cosine", "topk", "drop", "fused", "x"]),
    st.lists(st.integers(0, 3), max_size=3),
)
BASES = {name: make_config(*overrides) for name, overrides in {
    "sgd": (), "lamb": ("optim=lamb", "scaling=linear", "scaling.base_batch=32", "schedule=cosine"), "topk": ("sync=topk",),
}.items()}


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(base=st.sampled_from(sorted(BASES)), changes=st.dictionaries(st.sampled_from(KEYS), VALUES, min_size=1, max_size=3))
def test_any_value_gives_a_clear_error_or_a_valid_config(base, changes):
    cfg = OmegaConf.create(OmegaConf.to_container(BASES[base], resolve=True))
    for key, value in changes.items():
        OmegaConf.update(cfg, key, value, force_add=True)
    try:
        layout = validate_run(cfg)
    except ConfigError as err:
        assert err.key and str(err).startswith(err.key)
        return
    # accepted: the numbers that matter are sane
    assert layout.global_batch >= 1 and cfg.train.steps >= 1
