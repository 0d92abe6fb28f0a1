"""`scaledrill forecast`: inputs from a ladder, a run and the task model; forecast.json; bad inputs."""

import json
from pathlib import Path

import pytest
from omegaconf import OmegaConf

from conftest import composed
from scaledrill.commands.forecast import forecast_verb
from scaledrill.errors import ConfigError
from scaledrill.forecast import CAUTION

ROOT = Path(__file__).resolve().parents[1]

# A cluster small enough to work out by hand: no latency, so little bandwidth cost
# that communication vanishes, and 1 TFLOP per sample at 100 TFLOP/s = 0.01 s per
# sample on the busiest device.
HAND = {"devices": 256, "devices_per_node": 8, "peak_tflops": 100.0, "utilization": 1.0,
        "intra_bandwidth_gbps": 1000.0, "intra_latency_us": 0.0, "inter_bandwidth_gbps": 1000.0,
        "inter_latency_us": 0.0, "algorithm": "two_level", "overlap": 0.0, "price_per_device_hour": 1.0,
        "flops_per_sample": 1e12, "grad_bytes": 1.0, "compression_ratio": None, "ladder": None, "run": None}  # fmt: skip
RUNGS = [{"global_batch": 64, "steps_to_target": 4000}, {"global_batch": 256, "steps_to_target": 1200},
         {"global_batch": 1024, "steps_to_target": 400}, {"global_batch": 4096, "steps_to_target": None}]  # fmt: skip


def config(forecast: dict, batches=(256, 1024)) -> OmegaConf:
    task = composed("task", "digits")
    return OmegaConf.create({"forecast": forecast, "task": task, "batches": list(batches), "debug": False})


def ladder(tmp_path: Path, rungs=RUNGS) -> Path:
    directory = tmp_path / "ladder"
    directory.mkdir(exist_ok=True)
    (directory / "ladder.json").write_text(json.dumps({"grow": "workers", "rungs": rungs, "fit": None}))
    return directory


def run(cfg, tmp_path: Path) -> dict:
    forecast_verb(cfg, tmp_path / "out")
    return json.loads((tmp_path / "out" / "forecast.json").read_text())


def test_ladder_rungs_give_hand_checked_time_cost_and_flags(tmp_path, capsys):
    doc = run(config(HAND | {"ladder": str(ladder(tmp_path))}), tmp_path)
    printed = capsys.readouterr().out
    rows = {r["global_batch"]: r for r in doc["rungs"]}
    assert list(rows) == [64, 256, 1024, 4096]
    # B=64 fills 64 devices: 1 sample each, 0.01 s a step, 4000 steps = 40 s, 64·40/3600 device-hours
    assert rows[64]["devices"] == 64 and rows[64]["time_to_target_s"] == pytest.approx(40.0, rel=1e-6)
    assert rows[64]["cost"] == pytest.approx(64 * 40 / 3600, rel=1e-6)
    # B=256 on 256 devices: 0.01 s a step, 1200 steps = 12 s, 256·12/3600 = 0.853 device-hours
    assert rows[256]["time_to_target_s"] == pytest.approx(12.0, rel=1e-6)
    # B=1024: 4 samples per device, 0.04 s a step, 400 steps = 16 s
    assert rows[1024]["time_to_target_s"] == pytest.approx(16.0, rel=1e-6)
    assert [b for b, r in rows.items() if r["cheapest"]] == [64]
    assert [b for b, r in rows.items() if r["fastest"]] == [256]
    assert rows[4096]["cost"] is None and not rows[4096]["cheapest"] and not rows[4096]["fastest"]
    assert doc["caution"] == CAUTION and "not promises" in doc["caution"]
    assert doc["assumptions"]["sources"]["steps_to_target"].startswith("ladder.json of")
    assert doc["assumptions"]["sources"]["flops_per_sample"] == "given"
    assert printed.strip().splitlines()[-1] == str(tmp_path / "out" / "forecast.json")


def test_ladder_json_file_and_run_summary_are_read(tmp_path):
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    (run_dir / "summary.json").write_text(json.dumps({"compression_ratio": 8.0, "final_loss": 0.1}))
    forecast = HAND | {"grad_bytes": 4e6, "ladder": str(ladder(tmp_path) / "ladder.json"), "run": str(run_dir)}
    doc = run(config(forecast), tmp_path)
    assert doc["assumptions"]["compression_ratio"] == 8.0
    assert doc["assumptions"]["wire_bytes"] == pytest.approx(5e5)  # 4e6 bytes / 8
    assert doc["assumptions"]["sources"]["compression_ratio"] == f"summary.json of {run_dir}"
    # a ratio given in the config wins over the run's
    doc = run(config(forecast | {"compression_ratio": 2.0}), tmp_path)
    assert doc["assumptions"]["wire_bytes"] == pytest.approx(2e6)


def test_without_a_ladder_projects_step_time_for_the_batches(tmp_path):
    doc = run(config(HAND, batches=(128, 512, 2048)), tmp_path)
    assert [r["global_batch"] for r in doc["rungs"]] == [128, 512, 2048]
    # 1, 2 and 8 samples on the busiest device at 0.01 s each
    assert [r["step_s"] for r in doc["rungs"]] == pytest.approx([0.01, 0.02, 0.08], rel=1e-6)
    assert all(r["cost"] is None and not r["cheapest"] for r in doc["rungs"])


def test_flops_and_bytes_are_measured_on_the_task_model(tmp_path):
    cfg = config(HAND | {"flops_per_sample": None, "grad_bytes": None})
    cfg.task = composed("task", "teacher")  # MLP 32 -> 64 -> 64 -> 8
    doc = run(cfg, tmp_path)
    # closed form, 2·m·n·k per matmul: forward 2·(32·64 + 64·64 + 64·8) = 13312 per sample; backward
    # the weight gradients (13312 again) plus the input gradients of layers 2 and 3, 2·(64·64 + 64·8) = 9216
    assert doc["assumptions"]["flops_per_sample"] == 13312 + 13312 + 9216
    # float32 weights and biases: 4·(32·64 + 64 + 64·64 + 64 + 64·8 + 8) bytes
    assert doc["assumptions"]["grad_bytes"] == 4 * 6792
    assert doc["assumptions"]["sources"]["flops_per_sample"] == "counted (forward+backward) on task teacher"


@pytest.mark.parametrize(
    "key, make, rule",
    [
        ("forecast.ladder", lambda d: str(d / "nowhere"), "must be a directory holding ladder.json"),
        ("forecast.ladder", lambda d: _write(d / "bad" / "ladder.json", "{oops"), "is not readable JSON"),
        ("forecast.ladder", lambda d: _write(d / "e" / "ladder.json", '{"rungs": []}'), "at least one rung"),
        ("forecast.ladder", lambda d: _write(d / "n" / "ladder.json", '{"rungs": [{"global_batch": 0}]}'), "rung 0"),
        ("forecast.run", lambda d: str(d), "must be a directory holding summary.json"),
        ("forecast.run", lambda d: _write(d / "r" / "summary.json", '{"compression_ratio": -1}'), "must be > 0"),
    ],
)
def test_bad_inputs_name_the_key(tmp_path, key, make, rule):
    name = key.split(".")[1]
    with pytest.raises(ConfigError) as err:
        forecast_verb(config(HAND | {name: make(tmp_path)}), tmp_path / "out")
    assert err.value.key == key and rule in err.value.rule
    assert not (tmp_path / "out" / "forecast.json").exists()


def test_bad_batches_name_the_key(tmp_path):
    with pytest.raises(ConfigError) as err:
        forecast_verb(config(HAND, batches=(256, 0)), tmp_path)
    assert err.value.key == "batches"


def _write(path: Path, text: str) -> str:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return str(path)


def test_cli_writes_forecast_json_and_exits_2_on_a_bad_ladder(tmp_path):
    from conftest import run_cli

    run_cli("forecast", "forecast.flops_per_sample=1e9", "forecast.grad_bytes=1e6", f"hydra.run.dir={tmp_path / 'ok'}", check=True)
    doc = json.loads((tmp_path / "ok" / "forecast.json").read_text())
    assert [r["global_batch"] for r in doc["rungs"]] == [256, 1024, 4096, 16384]
    assert doc["assumptions"]["flops_per_sample"] == 1e9
    bad = run_cli("forecast", f"forecast.ladder={tmp_path / 'nowhere'}", f"hydra.run.dir={tmp_path / 'bad'}")
    assert bad.returncode == 2 and "forecast.ladder:" in bad.stderr
