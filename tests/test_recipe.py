"""Recipe resolution: published scaling values, epochs and steps, printing, and bad input."""

import json

import pytest
from rich.console import Console

from conftest import make_config
from scaledrill.errors import ConfigError, DataError
from scaledrill.layout import Layout
from scaledrill.config.rules import check_recipe
from scaledrill.optim import render_recipe, resolve_recipe

IMAGENET_TRAIN = 1_281_167  # ImageNet-1k training images (from memory)


def recipe(*overrides, size=1000, tail="drop"):
    cfg = make_config(*overrides)
    return resolve_recipe(cfg, Layout.from_config(cfg.layout), size, tail)


def test_goyal_linear_scaling_with_five_warmup_epochs():
    # Goyal et al. 2017: 256 workers × 32 = 8192, lr 0.1 per 256 -> 3.2, warmup 5 epochs from 0.1,
    # ÷10 at epochs 30, 60, 80 of 90
    r = recipe("layout.workers=256", "layout.micro_batch=32", "optim.lr=0.1", "scaling=linear",
               "scaling.base_batch=256", "schedule=step", "schedule.warmup_epochs=5", "schedule.warmup_start=0.03125",
               "schedule.milestones=[4680,9360,12480]", "train.steps=14040", size=IMAGENET_TRAIN)
    assert r.global_batch == 8192 and r.steps_per_epoch == 156  # 1281167 // 8192
    assert r.peak_lr == pytest.approx(3.2, rel=1e-12)
    assert r.warmup_steps == 780
    assert r.lr_at(0) == pytest.approx(0.1, rel=1e-12)  # warmup starts at the base lr
    assert r.lr_at(390) == pytest.approx(0.1 + 3.1 / 2, rel=1e-12)
    assert r.lr_at(780) == pytest.approx(3.2, rel=1e-12)
    assert r.lr_at(4680) == pytest.approx(0.32, rel=1e-12) and r.lr_at(14039) == pytest.approx(0.0032, rel=1e-12)
    assert r.epochs == pytest.approx(90.0, rel=1e-12)


def test_sqrt_rule():
    # lr ∝ √B (Krizhevsky 2014; Hoffer et al. 2017): 4× the batch, 2× the rate
    r = recipe("layout.workers=32", "layout.micro_batch=16", "optim=adamw", "optim.lr=0.001",
               "scaling=sqrt", "scaling.base_batch=128")
    assert r.global_batch == 512 and r.peak_lr == pytest.approx(0.002, rel=1e-12)


def test_power_rule_and_explicit_base_lr():
    r = recipe("layout.workers=16", "scaling=power", "scaling.base_batch=16", "scaling.exponent=0.75",
               "scaling.base_lr=0.5")
    assert r.global_batch == 256 and r.peak_lr == pytest.approx(0.5 * 8, rel=1e-12)  # 16^0.75 = 8


def test_no_rule_keeps_the_rate():
    assert recipe("optim.lr=0.3", "layout.workers=64", size=None).peak_lr == 0.3


def test_steps_per_epoch_follow_the_tail():
    assert recipe(tail="drop").steps_per_epoch == 7  # 1000 // 128
    assert recipe(tail="carry").steps_per_epoch == 1000 / 128
    stream = recipe(size=None)
    assert stream.steps_per_epoch is None and stream.epochs is None


@pytest.mark.parametrize("overrides, peak", [
    (["optim=sgd"], 0.1), (["optim=adamw"], 0.001), (["optim=lars"], 1.0), (["optim=lamb"], 0.001),
    (["scaling=linear", "scaling.base_batch=64"], 0.2),  # B = 128: 0.1 · 2
    (["scaling=sqrt", "scaling.base_batch=64"], 0.1 * 2**0.5),
    (["scaling=power", "scaling.base_batch=64"], 0.1 * 2**0.75),  # power.yaml: exponent 0.75
    (["schedule=cosine"], 0.1), (["schedule=polynomial"], 0.1), (["schedule=step"], 0.1),
])
def test_every_config_file_resolves(overrides, peak):
    r = recipe(*overrides)
    assert r.peak_lr == pytest.approx(peak, rel=1e-12) and r.lr_at(0) == pytest.approx(peak, rel=1e-12)


def test_render_and_json():
    r = recipe("schedule=cosine", "schedule.warmup_steps=20", "optim.lr=0.2")
    console = Console(record=True, width=120)
    console.print(render_recipe(r))
    text = console.export_text()
    assert "lr at step 10" in text and "0.1" in text and "lr at step 199" in text
    data = json.loads(json.dumps(r.to_json()))
    assert data["peak_lr"] == 0.2 and data["warmup_steps"] == 20 and data["steps_per_epoch"] == 7
    assert {"step": 20, "lr": 0.2} in data["lr_at"]


BAD = [
    (["optim.lr=0"], "optim.lr"),
    (["optim.lr=-0.1"], "optim.lr"),
    (["scaling.base_lr=0"], "scaling.base_lr"),
    (["scaling=linear"], "scaling.base_batch"),
    (["scaling=linear", "scaling.base_batch=0"], "scaling.base_batch"),
    (["scaling.rule=cubic"], "scaling.rule"),
    (["schedule.name=wave"], "schedule.name"),
    (["optim.name=adagrad"], "optim.name"),
    (["optim=lars", "optim.trust_coefficient=0"], "optim.trust_coefficient"),
    (["optim=lars", "optim.denominator=both"], "optim.denominator"),
    (["optim=lamb", "optim.trust_cap=-1"], "optim.trust_cap"),
    (["optim=lamb", "optim.betas=[0.9,1.0]"], "optim.betas"),
    (["optim.clip_norm=0"], "optim.clip_norm"),
    (["optim.weight_decay=-0.1"], "optim.weight_decay"),
    (["optim.decay=decoupled"], "optim.decay"),
    (["optim.exclude=3"], "optim.exclude"),
    (["schedule.warmup_steps=201"], "schedule.warmup_steps"),
    (["schedule.warmup_steps=5", "schedule.warmup_epochs=1"], "schedule.warmup_epochs"),
    (["schedule.warmup_start=1.5"], "schedule.warmup_start"),
    (["schedule=cosine", "schedule.final_factor=2"], "schedule.final_factor"),
    (["schedule=polynomial", "schedule.power=0"], "schedule.power"),
    (["schedule=step", "schedule.milestones=[0.5,100]"], "schedule.milestones"),
    (["schedule=step", "schedule.gamma=0"], "schedule.gamma"),
]


@pytest.mark.parametrize("overrides, key", BAD)
def test_bad_values_name_the_key(overrides, key):
    with pytest.raises(ConfigError) as err:
        check_recipe(make_config(*overrides))
    assert err.value.key == key


def test_warmup_in_epochs_longer_than_training():
    with pytest.raises(ConfigError) as err:
        recipe("schedule.warmup_epochs=30")  # 30 · 7 = 210 > 200 steps
    assert err.value.key == "schedule.warmup_epochs"


def test_warmup_in_epochs_needs_epochs():
    with pytest.raises(ConfigError) as err:
        recipe("schedule.warmup_epochs=1", size=None)
    assert err.value.key == "schedule.warmup_epochs"


def test_a_dataset_smaller_than_one_batch_is_refused():
    with pytest.raises(DataError):
        recipe(size=100)  # B = 128
