"""forecast.peak_tflops per precision: the run's precision picks the peak the compute time uses."""

import pytest
from conftest import composed

from scaledrill.errors import ConfigError
from scaledrill.forecast.cluster import validate
from scaledrill.forecast.project import project_step

def example(**changes):
    node = composed("forecast", "example")  # the schema's defaults, then the example's values
    for key, value in changes.items():
        node[key] = value
    return node


@pytest.mark.parametrize("precision, peak", [("fp32", 60.0), ("bf16", 300.0), ("fp16", 300.0)])
def test_the_precision_picks_its_peak_and_the_compute_time_follows(precision, peak):
    cluster = validate(example(precision=precision))
    assert (cluster.precision, cluster.peak_tflops) == (precision, peak)
    # B = 2560 on 256 devices: 10 samples each · 1e12 FLOPs / (peak · 1e12 · 0.4 utilization)
    step = project_step(cluster, 2560, flops_per_sample=1e12, grad_bytes=0.0)
    assert step.compute_s == pytest.approx(10 / (peak * 0.4), rel=1e-12)


def test_a_single_peak_still_serves_every_precision():
    cluster = validate(example(peak_tflops=100.0, precision="fp16"))
    assert cluster.peak_tflops == 100.0
    assert validate(example(peak_tflops=100.0, precision=None)).precision == "fp32"


@pytest.mark.parametrize(
    "changes, key, words",
    [
        ({"peak_tflops": {"fp32": 60.0, "bf16": 300.0}, "precision": "fp16"}, "forecast.peak_tflops", "forecast.peak_tflops.fp16"),
        ({"peak_tflops": {"fp32": 60.0, "tf32": 150.0}}, "forecast.peak_tflops.tf32", "is not a precision"),
        ({"precision": "fp8"}, "forecast.precision", "fp32, bf16, fp16"),
        ({"peak_tflops": {"fp32": 60.0, "bf16": -1.0, "fp16": 1.0}}, "forecast.peak_tflops", "> 0"),
    ],
)
def test_a_bad_peak_or_precision_names_the_key(changes, key, words):
    with pytest.raises(ConfigError) as caught:
        validate(example(**changes))
    assert caught.value.key == key and words in str(caught.value)
