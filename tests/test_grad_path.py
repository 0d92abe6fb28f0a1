"""The one rule that picks the gradient path (sync/path.py), as validation, the engine and the sync layer see it."""

import math

import pytest
from omegaconf import OmegaConf

from conftest import make_config
from scaledrill.config.rules import check_train
from scaledrill.config.validate import validate_run
from scaledrill.dist import LocalCollective
from scaledrill.errors import ConfigError
from scaledrill.sync.path import grad_path, path_cause
from scaledrill.train.engine import Trainer

# What each sync needs, written out: exact averaging sums per process; every
# compressor (and fp16/bf16, which round each worker's own gradient) needs one row
# per worker; error feedback keeps a residual per worker; the bitwise tree needs
# rows that do not depend on V, which only the loop path computes.
AUTO = {"exact": "fused", "fp16": "vmap", "bf16": "vmap", "topk": "vmap", "randk": "vmap",
        "sign": "vmap", "qsgd": "vmap", "powersgd": "vmap"}  # fmt: skip


def sync(name, **extra):
    return OmegaConf.create({"name": name, **extra})


@pytest.mark.parametrize("name", sorted(AUTO))
def test_auto_takes_the_cheapest_path_the_sync_can_use(name):
    assert grad_path("auto", sync(name)) == AUTO[name]
    assert grad_path("auto", sync(name, error_feedback=True)) == "vmap"
    assert grad_path("auto", sync(name, bitwise=True)) == "loop"


def test_an_explicit_path_is_kept_and_fused_is_refused_where_rows_are_needed():
    for asked in ("vmap", "loop"):
        assert grad_path(asked, sync("topk")) == asked
        assert path_cause(asked, sync("exact")) == f"train.grads={asked}"
    assert grad_path("fused", sync("exact")) == "fused" and path_cause("fused", sync("exact")) is None
    with pytest.raises(ConfigError) as err:
        grad_path("fused", sync("qsgd"))
    assert err.value.key == "train.grads" and "sync=qsgd" in str(err.value)
    with pytest.raises(ConfigError) as err:  # the one-of rule of train.grads: config/rules.py, before the path is asked for
        check_train({"grads": "fast"})
    assert err.value.key == "train.grads"


@pytest.mark.parametrize(
    "overrides, path",
    [
        ((), "fused"),
        (("sync=topk",), "vmap"),
        (("sync.error_feedback=true",), "vmap"),
        (("sync.bitwise=true",), "loop"),
    ],
)
def test_engine_and_sync_layer_follow_the_same_rule(overrides, path):
    trainer = Trainer(make_config("task=quadratic", "layout.workers=2", *overrides), LocalCollective())
    assert trainer.path == path
    assert trainer.sync.per_worker == (path != "fused")
    record = trainer.step()  # the rows the engine hands over have the shape the layer asks for
    assert math.isfinite(record.loss) and math.isfinite(record.grad_norm)


def test_validation_refuses_fused_under_a_compressor_before_any_process_starts():
    with pytest.raises(ConfigError) as err:
        validate_run(make_config("sync=powersgd", "train.grads=fused"))
    assert err.value.key == "train.grads" and "sync=powersgd" in str(err.value)
