"""The rules on configuration values (config/rules.py): a bad value of any group is refused
before anything runs, with a ConfigError naming its key and exit status 2 on the command line;
and every key a rule names is one the schemas declare (no rule on a key that cannot be set)."""

import pytest

from conftest import make_config, run_cli
from scaledrill.config import rules
from scaledrill.config.validate import validate_run, validated_job
from scaledrill.errors import ConfigError

# (overrides, the key the error names), group by group; each breaks one rule of config/rules.py
BAD_RUN = [
    (["layout.workers=0"], "layout.workers"),
    (["layout.accum=1.5"], "layout.accum"),
    (["layout.workers=6", "layout.procs=4", "layout.backend=gloo"], "layout.workers"),  # W % P
    (["layout.procs=2"], "layout.procs"),  # the local backend hosts one process
    (["train.steps=0"], "train.steps"),
    (["train.eval_every=-1"], "train.eval_every"),
    (["train.tail=keep"], "train.tail"),
    (["train.order=ddp"], "train.order"),
    (["train.grads=fast"], "train.grads"),
    (["train.dtype=float16"], "train.dtype"),
    (["train.precision=fp8"], "train.precision"),
    (["train.loss_scale=-2"], "train.loss_scale"),
    (["train.scaler.grow=1"], "train.scaler.grow"),
    (["train.timeout_s=0"], "train.timeout_s"),
    (["train.batchnorm=all"], "train.batchnorm"),
    (["train.batchnorm=global", "sync=topk"], "train.batchnorm"),  # global statistics need the fused path
    (["train.grads=fused", "sync=qsgd"], "train.grads"),  # fused cannot serve a per-worker sync
    (["optim.name=rmsprop"], "optim.name"),
    (["optim.lr=0"], "optim.lr"),
    (["optim.momentum=1"], "optim.momentum"),
    (["optim.nesterov=true", "optim.momentum=0"], "optim.nesterov"),
    (["optim.decay=decoupled"], "optim.decay"),  # sgd decays coupled only
    (["optim=lars", "optim.denominator=norm"], "optim.denominator"),
    (["optim=adamw", "optim.eps=-1"], "optim.eps"),
    (["scaling.rule=cubic"], "scaling.rule"),
    (["scaling=linear", "scaling.base_batch=null"], "scaling.base_batch"),
    (["schedule.name=exp"], "schedule.name"),
    (["schedule.warmup_steps=201"], "schedule.warmup_steps"),  # warmup longer than train.steps=200
    (["schedule.total_steps=0"], "schedule.total_steps"),
    (["schedule=step", "schedule.milestones=[10,500]"], "schedule.milestones"),
    (["sync=topk", "sync.fraction=1.5"], "sync.fraction"),
    (["sync=powersgd", "sync.rank=0"], "sync.rank"),
    (["sync.bucket_kib=0"], "sync.bucket_kib"),
    (["telemetry.flush_every=0"], "telemetry.flush_every"),
    (["telemetry.noise_decay=1.0"], "telemetry.noise_decay"),
    (["telemetry.on_trigger=halt"], "telemetry.on_trigger"),
    (["telemetry.detect.min_history=30", "telemetry.detect.spike_window=20"], "telemetry.detect.spike_window"),
    (["telemetry.detect.skip_storm=8", "telemetry.detect.skip_window=5"], "telemetry.detect.skip_window"),
    (["telemetry.incident.factor=1"], "telemetry.incident.factor"),
]


@pytest.mark.parametrize("overrides, key", BAD_RUN)
def test_a_bad_value_names_its_key(overrides, key):
    with pytest.raises(ConfigError) as err:
        validate_run(make_config(*overrides))
    assert err.value.key == key and str(err.value).startswith(f"{key}: ")


@pytest.mark.parametrize("overrides, key", [
    (["job.dataset_size=100", "job.epochs=1", "job.steps=5"], "job.steps"),
    (["job.baseline.devices=8"], "job.baseline.batch"),
])
def test_a_bad_job_names_its_key(overrides, key):
    with pytest.raises(ConfigError) as err:
        validated_job(make_config(*overrides, name="recipe").job)
    assert err.value.key == key


@pytest.mark.parametrize("overrides, key", [
    (["check.steps=0"], "check.steps"),
    (["check.paths=[fused,warp]"], "check.paths"),
    (["check.backends=[]"], "check.backends"),
    (["sync=topk"], "sync.name"),  # the check compares exact averaging only
])
def test_a_bad_check_setting_names_its_key(overrides, key):
    with pytest.raises(ConfigError) as err:
        rules.check_check(make_config(*overrides, name="check"))
    assert err.value.key == key


@pytest.mark.parametrize("overrides, key", [
    (["ladder.grow=both"], "ladder.grow"),
    (["ladder.goal.reached_when=under"], "ladder.goal.reached_when"),
    (["ladder.goal.value=inf"], "ladder.goal.value"),
    (["ladder.check_every=0"], "ladder.check_every"),
    (["ladder.rungs=0"], "ladder.rungs"),
    (["ladder.batches=[64,64]"], "ladder.batches"),
    (["ladder.max_steps=0"], "ladder.max_steps"),
    (["ladder.search.lo=2", "ladder.search.hi=1"], "ladder.search.hi"),  # hi must exceed lo
    (["ladder.search.reduction=1"], "ladder.search.reduction"),
    (["ladder.search.explode=0"], "ladder.search.explode"),
])
def test_a_bad_ladder_setting_names_its_key(overrides, key):
    cfg = make_config(*overrides, name="ladder")
    with pytest.raises(ConfigError) as err:
        rules.check_ladder(cfg)
        rules.check_search(cfg.ladder.search)
    assert err.value.key == key


@pytest.mark.parametrize("verb, overrides, key", [
    ("replay", ["replay.from=somewhere", "replay.departure_rtol=-1"], "replay.departure_rtol"),
    ("adopt", ["adopt.from=model.pt", "adopt.step=-1"], "adopt.step"),
    ("replay", ["replay.from=somewhere", "+replay.variants.original='optim.lr=1'"], "replay.variants.original"),
    ("replay", ["replay.from=somewhere", "+replay.variants.a=[lr]"], "replay.variants.a"),
    ("replay", ["replay.from=somewhere", "+replay.variants.b='train.steps=9'"], "replay.variants.b"),
])
def test_a_bad_replay_or_adopt_setting_names_its_key(verb, overrides, key):
    with pytest.raises(ConfigError) as err:
        getattr(rules, f"check_{verb}")(make_config(*overrides, name=verb)[verb])
    assert err.value.key == key


def test_the_rule_texts_are_the_ones_users_read():
    def message(*overrides):
        with pytest.raises(ConfigError) as err:
            validate_run(make_config(*overrides))
        return str(err.value)

    assert message("layout.workers=6", "layout.procs=4", "layout.backend=gloo") == (
        "layout.workers: must be a multiple of layout.procs=4, since every process hosts the same number of workers (got 6)")
    assert message("schedule.warmup_steps=201") == (
        "schedule.warmup_steps: warmup is longer than training (train.steps=200) (got 201)")
    assert message("optim.decay=decoupled") == "optim.decay: sgd supports coupled weight decay (got 'decoupled')"
    assert message("telemetry.detect.skip_storm=8", "telemetry.detect.skip_window=5") == (
        "telemetry.detect.skip_window: must be a whole number no smaller than telemetry.detect.skip_storm=8 (got 5)")


# one bad value per group through the command line: exit 2, the key in one paragraph, no traceback
CLI = [
    ("run", "layout.workers=0", "layout.workers"),
    ("run", "train.tail=keep", "train.tail"),
    ("run", "optim.momentum=1", "optim.momentum"),
    ("run", "scaling.rule=cubic", "scaling.rule"),
    ("run", "schedule.warmup_start=2", "schedule.warmup_start"),
    ("run", "sync.bucket_kib=0", "sync.bucket_kib"),
    ("run", "telemetry.noise_decay=1.0", "telemetry.noise_decay"),
    ("recipe", "job.baseline.devices=8", "job.baseline.batch"),
    ("check", "check.tolerance_scale=0", "check.tolerance_scale"),
]


@pytest.mark.parametrize("verb, override, key", CLI)
def test_the_command_line_exits_2_naming_the_key(tmp_path, verb, override, key):
    done = run_cli(verb, "task=teacher", override, f"hydra.run.dir={tmp_path / 'out'}")
    assert done.returncode == 2, done.stderr
    assert key in done.stderr and "Traceback" not in done.stderr
    assert not (tmp_path / "out" / "summary.json").exists()


def _declared(cfg, dotted: str) -> bool:
    node = cfg
    for part in dotted.split("."):
        if part not in node:
            return False
        node = node[part]
    return True


@pytest.mark.parametrize("group, table, overrides, verb", [
    ("layout", rules.LAYOUT, [], "run"),
    ("train", rules.TRAIN, [], "run"),
    ("optim", rules.OPTIM, [], "run"),
    *[("optim", t, [f"optim={name}"], "run") for name, t in rules.OPTIM_BY_NAME.items()],
    ("schedule", rules.SCHEDULE, [], "run"),
    *[("schedule", t, [f"schedule={name}"], "run") for name, t in rules.SCHEDULE_BY_NAME.items()],
    ("telemetry", rules.TELEMETRY, [], "run"),
    ("job", rules.JOB, [], "run"),
    ("check", rules.CHECK, [], "check"),
    ("ladder", rules.LADDER, [], "ladder"),
    ("ladder", {f"goal.{key}": rule for key, rule in rules.GOAL.items()}, [], "ladder"),
    ("ladder", {f"search.{key}": rule for key, rule in rules.LADDER_SEARCH.items()}, [], "ladder"),
])
def test_every_rule_names_a_key_the_schema_declares(group, table, overrides, verb):
    cfg = make_config(*overrides, name=verb)[group]
    assert [key for key in table if not _declared(cfg, key)] == []


def test_every_sync_rule_names_a_key_some_compressor_takes():
    declared = set()
    for name in ("exact", "topk", "randk", "qsgd", "powersgd", "sign"):
        declared |= set(make_config(f"sync={name}").sync)
    assert set(rules.SYNC) <= declared


@pytest.mark.parametrize("batches", [[], [0, 64], [64.5], "64", None])
def test_forecast_batches_are_whole_and_positive(batches):
    with pytest.raises(ConfigError) as err:
        rules.check_forecast_batches(batches)
    assert err.value.key == "batches"
    rules.check_forecast_batches([64, 4096])  # fine: no error
