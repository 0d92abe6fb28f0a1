"""The real job (configs/job/): its recipe on its own dataset and length, beside the rehearsal's."""

import json

import pytest
from rich.console import Console

from conftest import make_config, run_cli
from scaledrill.errors import ConfigError
from scaledrill.layout import Layout
from scaledrill.optim import render_recipe, resolve_recipe
from scaledrill.config.validate import validate_job_recipe, validated_job
from scaledrill.optim.job import job_recipe

# Goyal et al. 2017, "Accurate, Large Minibatch SGD: Training ImageNet in 1 Hour" (arXiv 1706.02677):
# ImageNet-1k (1,281,167 training images, from memory), 90 epochs, global batch 8192 = 256 workers × 32,
# lr 0.1 per 256 samples scaled linearly, 5 epochs of gradual warmup from 0.1, ÷10 at epochs 30, 60, 80.
GOYAL = ["layout.workers=256", "layout.micro_batch=32", "optim.lr=0.1", "scaling=linear", "scaling.base_batch=256",
         "schedule=step", "schedule.warmup_epochs=5", "schedule.warmup_start=0.03125",
         "schedule.milestones=[0.3333333333,0.6666666667,0.8888888889]", "job=imagenet"]


def planned(*overrides):
    cfg = make_config(*overrides, name="recipe")
    layout, job = Layout.from_config(cfg.layout), validated_job(cfg.job)
    validate_job_recipe(cfg, layout, job)
    return job_recipe(cfg, layout, job)


def test_goyal_imagenet_recipe_from_the_job_alone():
    r = planned(*GOYAL)
    # the paper's setup implies: 1281167 // 8192 = 156 steps per epoch (tail dropped), 90 · 156 = 14040 steps,
    # 5 · 156 = 780 warmup steps, peak lr 0.1 · 8192 / 256 = 3.2, decays at 30·156, 60·156, 80·156
    assert r.steps_per_epoch == 156 and r.total_steps == 14040 and r.warmup_steps == 780
    assert r.peak_lr == pytest.approx(3.2, rel=1e-12)
    assert r.schedule.milestones == (4680, 9360, 12480)
    assert r.lr_at(0) == pytest.approx(0.1, rel=1e-12) and r.lr_at(780) == pytest.approx(3.2, rel=1e-12)
    assert r.lr_at(12480) == pytest.approx(0.0032, rel=1e-9)


def test_carry_tail_counts_partial_epochs():
    r = planned(*GOYAL, "train.tail=carry")
    assert r.steps_per_epoch == pytest.approx(1281167 / 8192) and r.total_steps == 14076  # ⌈90 · 156.39⌉


def test_the_cli_prints_both_columns_and_writes_both(tmp_path):
    # B = 8 · 32 = 256 fits the digits task (1437 training samples), so both columns appear
    done = run_cli("recipe", "layout.workers=8", "layout.micro_batch=32", "schedule.warmup_epochs=1", "job=imagenet",
                   f"hydra.run.dir={tmp_path}", check=True)
    assert "real job (job.*)" in done.stdout and "rehearsal (train.steps)" in done.stdout
    doc = json.loads((tmp_path / "recipe.json").read_text())
    assert doc["real_job"]["steps_per_epoch"] == 1281167 // 256 and doc["real_job"]["total_steps"] == 90 * 5004
    assert doc["steps_per_epoch"] == 1437 // 256 and doc["total_steps"] == 200  # the rehearsal's, as before
    assert doc["real_job"]["warmup_steps"] == 5004 and doc["warmup_steps"] == 5


def test_a_rehearsal_smaller_than_the_batch_is_no_error_with_a_job(tmp_path):
    done = run_cli("recipe", *GOYAL, f"hydra.run.dir={tmp_path}")
    assert done.returncode == 0, done.stderr
    assert "1437" in done.stdout and "14040" in done.stdout
    doc = json.loads((tmp_path / "recipe.json").read_text())
    assert doc["real_job"]["total_steps"] == 14040 and "rehearsal_skipped" in doc


def test_side_by_side_table_has_one_column_each():
    cfg = make_config("layout.workers=8", "layout.micro_batch=32", "job.steps=1000", name="recipe")
    layout = Layout.from_config(cfg.layout)
    real, rehearsal = job_recipe(cfg, layout, validated_job(cfg.job)), resolve_recipe(cfg, layout, 1437, "drop")
    console = Console(record=True, width=200)
    console.print(render_recipe({"job": real, "rehearsal": rehearsal}))
    text = console.export_text()
    assert "1000" in text and "200" in text and "step 999" in text and "step 199" in text


@pytest.mark.parametrize("overrides, key", [
    (["job.dataset_size=0", "job.epochs=1"], "job.dataset_size"),
    (["job.epochs=1"], "job.dataset_size"),
    (["job.dataset_size=100"], "job.epochs"),
    (["job.dataset_size=100", "job.epochs=-1"], "job.epochs"),
    (["job.dataset_size=100", "job.epochs=1", "job.steps=5"], "job.steps"),
    (["job.baseline.batch=256"], "job.baseline.devices"),
    (["+job.epoch=3"], "job.epoch"),
])
def test_bad_job_values_name_the_key(overrides, key):
    with pytest.raises(ConfigError) as err:
        validated_job(make_config(*overrides, name="recipe").job)
    assert err.value.key == key


def test_a_job_smaller_than_one_batch_names_the_key():
    with pytest.raises(ConfigError) as err:
        planned("layout.workers=256", "job.dataset_size=1000", "job.epochs=2")
    assert err.value.key == "job.dataset_size"


def test_warmup_longer_than_the_job_names_its_length():
    with pytest.raises(ConfigError) as err:
        planned("schedule.warmup_steps=500", "job.steps=100")
    assert err.value.key == "schedule.warmup_steps"
