"""The real model counted on the meta device: published forward costs, and the verb with a job and baseline."""

import json
from pathlib import Path

import pytest
import torch
from omegaconf import OmegaConf

from scaledrill.commands.forecast import forecast_verb
from scaledrill.errors import ConfigError
from scaledrill.forecast.model import count_model

ROOT = Path(__file__).resolve().parents[1]


def node(target: str, **kwargs):
    return OmegaConf.create({"_target_": target, **kwargs})


def test_resnet50_forward_matches_he_et_al():
    # He et al. 2016, "Deep Residual Learning for Image Recognition", Table 1: ResNet-50 costs
    # 3.8×10⁹ FLOPs forward at 224×224 (from memory). The paper counts multiply-adds; torch's
    # flop counter counts 2 FLOPs per multiply-add, so its forward is halved before comparing.
    # ~25.6M parameters (from memory).
    counted = count_model(node("models_reference.ResNet50"), [3, 224, 224])
    assert counted["forward"] / 2 == pytest.approx(3.8e9, rel=0.05)
    assert counted["parameters"] == pytest.approx(25.6e6, rel=0.01)
    assert counted["grad_bytes"] == 4 * counted["parameters"]  # float32 gradients
    # the first convolution needs no input gradient, every other layer does: backward just under 2× forward
    assert 1.9 < counted["backward"] / counted["forward"] <= 2.0


def test_gpt_350m_matches_six_n_per_token():
    # Kaplan et al. 2020, "Scaling Laws for Neural Language Models", sec. 2.1: training costs
    # C ≈ 6·N FLOPs per token (N the non-embedding parameters, here plus the LM head, a matmul),
    # with attention adding 6·n_layer·n_ctx·d per token: small when n_ctx << 12·d.
    d, layers, context, vocab = 1024, 24, 128, 50257
    counted = count_model(node("models_reference.GPT", d=d, layers=layers, context=context, vocab=vocab),
                          [context], "int64")  # fmt: skip
    matmul_params = layers * 12 * d * d + d * vocab  # QKV, projection, 4·d MLP per layer; the head
    assert counted["parameters"] == pytest.approx(355e6, rel=0.02)  # "GPT-2 medium", 355M (from memory)
    assert counted["train"] / context == pytest.approx(6 * matmul_params, rel=0.05)


def test_a_model_bigger_than_memory_is_counted_without_it():
    # 8·(4096²)·12 ≈ 1.6 billion parameters: 6.4 GB of float32 weights that are never allocated
    counted = count_model(node("models_reference.GPT", d=4096, layers=8, heads=32, context=64, vocab=1000),
                          [64], "int64")  # fmt: skip
    assert counted["parameters"] > 1.6e9 and counted["train"] > 0


@pytest.mark.parametrize("settings, key", [
    ({"_target_": "nowhere.Net"}, "forecast.model._target_"),
    ({"_target_": "torch.nn.Linear", "in_features": 8, "out_features": 2}, "forecast.sample_shape"),
])
def test_bad_models_name_the_key(settings, key):
    with pytest.raises(ConfigError) as err:
        count_model(OmegaConf.create(settings), [9])  # Linear(8) cannot take 9 features
    assert err.value.key == key


def test_bad_sample_settings_name_the_key():
    with pytest.raises(ConfigError) as err:
        count_model(node("torch.nn.Linear", in_features=8, out_features=2), [0])
    assert err.value.key == "forecast.sample_shape"
    with pytest.raises(ConfigError) as err:
        count_model(node("torch.nn.Linear", in_features=8, out_features=2), [8], "complex")
    assert err.value.key == "forecast.sample_dtype"


# A cluster to work out by hand: no latency and huge links, so communication vanishes;
# 1 TFLOP per sample at 100 TFLOP/s = 0.01 s per sample on the busiest device.
HAND = {"devices": 256, "devices_per_node": 8, "peak_tflops": 100.0, "utilization": 1.0,
        "intra_bandwidth_gbps": 1e9, "intra_latency_us": 0.0, "inter_bandwidth_gbps": 1e9,
        "inter_latency_us": 0.0, "algorithm": "two_level", "overlap": 0.0, "price_per_device_hour": 1.0,
        "flops_per_sample": 1e12, "grad_bytes": 1.0, "compression_ratio": None, "ladder": None, "run": None}  # fmt: skip


def test_job_steps_and_the_baseline_row(tmp_path):
    job = {"dataset_size": 1_281_167, "epochs": 90, "steps": None, "baseline": {"batch": 256, "devices": 8}}
    task = OmegaConf.load(ROOT / "src" / "scaledrill" / "conf" / "task" / "digits.yaml")
    cfg = OmegaConf.create({"forecast": HAND, "task": task, "job": job, "batches": [8192], "debug": False})
    forecast_verb(cfg, tmp_path)
    doc = json.loads((tmp_path / "forecast.json").read_text())
    base, (row,) = doc["baseline"], doc["rungs"]
    # baseline: 1281167 // 256 = 5004 steps per epoch, 90 epochs; 32 samples per device, 0.32 s a step
    assert base["devices"] == 8 and base["steps_to_target"] == 450360
    assert base["time_to_target_s"] == pytest.approx(450360 * 0.32, rel=1e-9)
    # target: 156 steps per epoch, 14040 steps; 32 samples on each of 256 devices, 0.32 s a step
    assert row["devices"] == 256 and row["steps_to_target"] == 14040
    assert row["speed_up"] == pytest.approx(450360 / 14040, rel=1e-9)  # 32.08×: the same step time
    assert row["cost_ratio"] == pytest.approx((256 * 14040) / (8 * 450360), rel=1e-9)  # 1.0 up to the dropped tails
    assert doc["assumptions"]["sources"]["steps_to_target"].startswith("job: 90 epochs")


def test_forecast_counts_the_real_model_on_the_meta_device(tmp_path, capsys):
    settings = HAND | {"flops_per_sample": None, "grad_bytes": None, "sample_shape": [3, 224, 224],
                       "model": {"_target_": "models_reference.ResNet50"}}  # fmt: skip
    cfg = OmegaConf.create({"forecast": settings, "task": {"name": "unused"}, "batches": [1024], "debug": False})
    forecast_verb(cfg, tmp_path)
    doc = json.loads((tmp_path / "forecast.json").read_text())
    assert doc["model"]["forward"] / 2 == pytest.approx(3.8e9, rel=0.05)  # He et al. 2016, as above
    assert doc["assumptions"]["grad_bytes"] == 4 * doc["model"]["parameters"]
    assert "forward+backward" in capsys.readouterr().out
