"""The configuration schemas: the dataclasses are the defaults every verb composes, every
verb that trains sees the same `train` keys, and a key that does not exist (misspelt,
added with +, or renamed) gets one paragraph naming it and the keys that do exist."""

from dataclasses import asdict

import pytest
from omegaconf import OmegaConf

from conftest import make_config, run_cli
from scaledrill.config.keys import refuse_unknown
from scaledrill.config.schema import LayoutConfig, RunConfig, ScalingConfig, ScheduleConfig, TaskConfig, TrainConfig
from scaledrill.config.verbs_schema import CheckConfig, LadderConfig, ReplayConfig
from scaledrill.errors import ConfigError
from scaledrill.optim.settings import LambConfig, SgdConfig
from scaledrill.sync.settings import PowersgdConfig, SyncConfig
from scaledrill.telemetry.settings import TelemetryConfig

TRAINING_VERBS = {"run": (), "recipe": (), "check": (), "ladder": (), "replay": ("replay.from=somewhere",)}


def plain(node) -> dict:
    return OmegaConf.to_container(node, resolve=False)


@pytest.mark.parametrize("verb", TRAINING_VERBS)
def test_every_training_verb_composes_the_schema_defaults(verb):
    cfg = make_config(*TRAINING_VERBS[verb], name=verb)
    train = {**asdict(TrainConfig()), **({"progress": False} if verb == "check" else {})}  # check.yaml: quiet
    assert plain(cfg.train) == train
    assert plain(cfg.layout) == asdict(LayoutConfig())
    assert plain(cfg.optim) == asdict(SgdConfig())
    assert plain(cfg.sync) == asdict(SyncConfig())
    assert plain(cfg.telemetry) == asdict(TelemetryConfig())
    assert plain(cfg.schedule) == asdict(ScheduleConfig())
    assert plain(cfg.scaling) == asdict(ScalingConfig())
    assert cfg.resume is None and cfg.debug is False


def test_the_verbs_own_keys_are_their_schemas():
    assert plain(make_config(name="check").check) == asdict(CheckConfig())
    assert plain(make_config(name="ladder").ladder) == asdict(LadderConfig())
    replay = plain(make_config("replay.from=x", name="replay").replay)
    assert replay == {**{k: v for k, v in asdict(ReplayConfig(source="x")).items() if k != "source"}, "from": "x"}


def test_every_training_verb_has_the_same_train_keys():
    keys = {verb: set(make_config(*extra, name=verb).train) for verb, extra in TRAINING_VERBS.items()}
    assert all(k == keys["run"] for k in keys.values()), keys
    assert "batchnorm" in keys["recipe"] and "batchnorm" in keys["ladder"]


def test_presets_hold_only_what_differs():
    # a preset changes its schema's defaults where it says so, and nothing else
    assert plain(make_config("optim=lamb").optim) == asdict(LambConfig())
    assert plain(make_config("sync=powersgd").sync) == {**asdict(PowersgdConfig()), "exact_until": 10, "rank": 2}
    assert plain(make_config("sync=fp16").sync) == {**asdict(SyncConfig()), "name": "fp16"}
    assert plain(make_config("scaling=sqrt", "scaling.base_batch=32").scaling) == {
        **asdict(ScalingConfig()), "rule": "sqrt", "base_batch": 32, "exponent": 0.5}
    task = make_config("task=teacher").task
    assert set(task) == set(asdict(TaskConfig(model={}, data={}, loss={}))) and task.model._target_.endswith("MLP")


def test_run_config_is_the_root_of_run():
    assert OmegaConf.get_type(make_config()) is RunConfig


@pytest.mark.parametrize("overrides, old, new", [
    (("optim=lamb", "optim.trust_clip=2.0"), "optim.trust_clip", "optim.trust_cap"),
    (("sync=powersgd", "sync.start_step=5"), "sync.start_step", "sync.exact_until"),
    (("sync=powersgd", "sync.min_compression=2.0"), "sync.min_compression", "sync.min_saving"),
    (("sync.bucket_mib=25",), "sync.bucket_mib", "sync.bucket_kib"),
    (("ladder.target.metric=loss",), "ladder.target.metric", "ladder.goal.metric"),
    (("ladder.target.mode=above",), "ladder.target.mode", "ladder.goal.reached_when"),
    (("ladder.mode=accum",), "ladder.mode", "ladder.grow"),
])
def test_renamed_keys_are_refused_naming_the_new_key(overrides, old, new):
    with pytest.raises(ConfigError) as err:
        make_config(*overrides, name="ladder")
    assert err.value.key.startswith(old) and f"use {new}" in str(err.value)


def test_an_added_unknown_key_is_refused_with_the_nearest_keys():
    with pytest.raises(ConfigError) as err:
        make_config("+train.epochs=90", "+telemetry.detect.spike=3")  # composes, then refuses as the command line does
    assert err.value.key == "telemetry.detect.spike" and "did you mean telemetry.detect.spike_z" in str(err.value)
    refuse_unknown(make_config("+task.model.extra=1"))  # a task's model, data and loss are the user's own: open


def _one_paragraph(done, *needles):
    assert done.returncode == 2, (done.returncode, done.stderr)
    assert "Traceback" not in done.stderr and "HYDRA_FULL_ERROR" not in done.stderr
    assert len([line for line in done.stderr.strip().splitlines() if line.strip()]) == 1, done.stderr
    for needle in needles:
        assert needle in done.stderr, done.stderr


@pytest.mark.parametrize("override", ["train.epochs=90", "+train.epochs=90"])
def test_the_command_line_names_a_misspelt_key_and_the_nearest(tmp_path, override):
    done = run_cli("recipe", override, f"hydra.run.dir={tmp_path}")
    _one_paragraph(done, "train.epochs: no such key", "did you mean train.steps", "checkpoint_every")
    assert "Could not override" not in done.stderr and "not in 'TrainConfig'" not in done.stderr


def test_the_command_line_names_the_renamed_preset_group(tmp_path):
    _one_paragraph(run_cli("recipe", "+recipe=divergence", f"hydra.run.dir={tmp_path}"), "+scenario")
    _one_paragraph(run_cli("recipe", "optim=adam", f"hydra.run.dir={tmp_path}"), "optim=adamw", "lars")
