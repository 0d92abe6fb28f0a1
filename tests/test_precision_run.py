"""Mixed precision in whole runs: one skip decision on every layout, the telemetry and
detectors it feeds, the underflow scenario, 16-bit accumulation named by check."""

import json

import pytest

from conftest import make_config, run_cli
from scaledrill.config.validate import validate_train
from scaledrill.dist import LocalCollective
from scaledrill.errors import ConfigError
from scaledrill.telemetry import read_scalars
from scaledrill.train.engine import Trainer

# A start far above fp16's range and a large growth factor: overflows come and go.
OVERFLOWING = ["task=teacher", "train.precision=fp16", "train.scaler.start=68719476736.0", "train.scaler.grow=256.0",
               "train.scaler.shrink=0.25", "train.scaler.patience=3", "train.progress=false", "train.eval_every=0"]


def test_every_layout_skips_the_same_steps(tmp_path):
    """The decision is taken on the all-reduced gradient, which every process holds:
    4 workers in one process and 2 gloo processes of 2 skip the same steps."""
    common = [*OVERFLOWING, "train.scaler.start=16777216.0", "layout.workers=4", "layout.micro_batch=16", "train.steps=12",
              "telemetry.detect.skip_storm=null", "telemetry.layer_every=4"]
    trainer = Trainer(make_config(*common), LocalCollective())
    records = [trainer.step() for _ in range(12)]
    one = [(r.precision["skipped"], r.precision["loss_scale"]) for r in records]
    assert 0 < sum(r.skipped for r in records) < 12
    assert all("underflow_share" in stats for stats in records[4].layers.values())  # per layer on layer steps

    run_cli("run", *common, "layout.procs=2", "layout.backend=gloo", f"hydra.run.dir={tmp_path}", check=True)
    summary = json.loads((tmp_path / "summary.json").read_text())
    scalars = read_scalars(tmp_path / "run.sqlite")
    assert list(zip(scalars["skipped"][1], scalars["loss_scale"][1])) == one
    assert (summary["precision"], summary["skipped_steps"]) == ("fp16", trainer.precision.scaler.skipped)
    assert summary["final_loss_scale"] == trainer.precision.scaler.scale
    assert len(scalars["grad_norm"][0]) == 12 - summary["skipped_steps"]  # a skipped step logs no gradient norm
    assert 0.0 <= min(scalars["underflow_share"][1]) and max(scalars["overflow_share"][1]) <= 1.0


def test_an_overflow_storm_stops_the_run_with_an_incident(tmp_path):
    # shrink 0.5 from 2^36 needs ~20 halvings to fit fp16: 3 skips in a row is a storm here.
    run_cli("run", *OVERFLOWING, "train.scaler.shrink=0.5", "train.steps=20", "telemetry.detect.skip_storm=3",
            "telemetry.detect.skip_window=5", f"hydra.run.dir={tmp_path}")
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["diverged"] and "overflow storm at step 2" in summary["stop_reason"]
    assert (summary["skipped_steps"], summary["final_loss_scale"]) == (3, 2.0**33)  # 2^36 halved three times
    incident = json.loads((tmp_path / "incident-2.json").read_text())
    assert "overflow storm" in json.dumps(incident)


def test_a_collapsing_scale_fires():
    cfg = make_config(*OVERFLOWING, "train.scaler.start=4.0", "train.scaler.shrink=0.125", "task.loss.weight=1e6",
                      "telemetry.detect.scale_floor=1.0", "telemetry.detect.skip_storm=null")
    from scaledrill.telemetry.detectors import build_detectors

    trainer, detectors = Trainer(cfg, LocalCollective()), build_detectors(cfg.telemetry)
    reasons = []
    for _ in range(4):
        scalars = trainer.step().scalars()
        reasons += [r for r in (d.observe(trainer.step_index - 1, scalars) for d in detectors) if r]
    assert any("loss scale collapsed" in r for r in reasons)


def scenario(*extra, steps=60):
    cfg = make_config("+scenario=underflow", f"train.steps={steps}", *extra)
    trainer = Trainer(cfg, LocalCollective())
    records = [trainer.step() for _ in range(steps)]
    return records


def test_fp16_without_loss_scaling_stalls_where_dynamic_scaling_trains():
    # Micikevicius et al. 2018 ("Mixed Precision Training", §3.2): gradients below fp16's
    # smallest subnormal flush to zero unless the loss is scaled up first.
    fp32 = scenario("train.precision=fp32")
    stalled = scenario()  # the scenario as written: fp16, train.loss_scale=none
    scaled = scenario("train.loss_scale=dynamic")
    start = fp32[0].loss
    assert min(r.precision["underflow_share"] for r in stalled) == 1.0  # every gradient value flushed
    assert min(r.loss for r in stalled[-10:]) > 0.8 * start  # no progress (noise only: new batches each step)
    assert scaled[-1].loss < 0.5 * start
    assert scaled[-1].loss == pytest.approx(fp32[-1].loss, rel=0.05)  # scaling recovers the fp32 run
    assert max(r.precision["underflow_share"] for r in scaled) < 0.5


def test_check_names_16_bit_accumulation(tmp_path):
    done = run_cli("check", "task=teacher", "layout.workers=2", "layout.accum=4", "train.accum_dtype=fp16",
                   "check.paths=[accumulation]", "check.steps=2", f"hydra.run.dir={tmp_path}")
    assert done.returncode == 1, done.stdout + done.stderr
    (finding,) = json.loads((tmp_path / "check.json").read_text())["diagnosis"]
    assert "accumulation in fp16" in finding["cause"] and "train.accum_dtype=fp32" in finding["fix"]


@pytest.mark.parametrize(
    "override, key",
    [("train.precision=fp8", "train.precision"), ("train.accum_dtype=half", "train.accum_dtype"),
     ("train.loss_scale=-2", "train.loss_scale"), ("train.scaler.shrink=1.5", "train.scaler.shrink"),
     ("train.scaler.patience=0", "train.scaler.patience"), ("+train.scaler.factor=2", "train.scaler.factor")],
)
def test_bad_precision_settings_name_the_key(override, key):
    with pytest.raises(ConfigError) as caught:
        validate_train(make_config(override))
    assert caught.value.key == key


def test_check_under_fp16_matches_with_a_settled_scale_and_names_skips_otherwise(tmp_path):
    common = ["check", "task=teacher", "layout.workers=4", "train.precision=fp16", "check.paths=[fused]", "check.steps=3"]
    settled = run_cli(*common, "train.scaler.start=1024.0", f"hydra.run.dir={tmp_path / 'settled'}")
    assert settled.returncode == 0, settled.stdout + settled.stderr  # scaling, autocast and unscaling match float64 within fp16's rule
    report = json.loads((tmp_path / "settled" / "check.json").read_text())
    assert report["paths"][0]["ok"]
    skipping = run_cli(*common, f"hydra.run.dir={tmp_path / 'skipping'}")  # 65536 overflows on this model's first steps
    assert skipping.returncode == 1
    (finding,) = json.loads((tmp_path / "skipping" / "check.json").read_text())["diagnosis"]
    assert finding["cause"].startswith("fp16 overflow") and "train.scaler.start" in finding["fix"]


def test_a_resumed_run_continues_the_scale_bitwise(tmp_path):
    from scaledrill.train import checkpoint

    cfg = make_config(*OVERFLOWING, "train.scaler.start=16777216.0", "layout.workers=2", "layout.micro_batch=16")
    straight = Trainer(cfg, LocalCollective())
    records = [straight.step() for _ in range(10)]
    first = Trainer(cfg, LocalCollective())
    for _ in range(5):
        first.step()
    saved = checkpoint.save(first, None, tmp_path)
    resumed = Trainer(cfg, LocalCollective())
    checkpoint.restore(resumed, None, checkpoint.load(saved))
    tail = [resumed.step() for _ in range(5)]
    assert [(r.precision["loss_scale"], r.skipped) for r in tail] == [(r.precision["loss_scale"], r.skipped) for r in records[5:]]
    assert any(r.skipped for r in records) and not all(r.skipped for r in records)
    assert resumed.precision.scaler.state_dict() == straight.precision.scaler.state_dict()
    assert all(bool((a == b).all()) for a, b in zip(resumed.params, straight.params))
