import math

import numpy as np
import pytest
from omegaconf import OmegaConf

from conftest import composed
from scaledrill.errors import ConfigError
from scaledrill.config.rules import check_telemetry
from scaledrill.telemetry.detectors import GradExplosion, InitialRise, LossSpike, NonFinite, OverflowStorm, ScaleCollapse, build_detectors


def healthy(steps=1000, seed=0):
    """A noisy decreasing loss and a noisy gradient norm, as a sound run produces."""
    rng = np.random.default_rng(seed)
    t = np.arange(steps)
    loss = (2.0 * np.exp(-t / 200) + 0.3) * (1 + 0.05 * rng.standard_normal(steps))
    grad_norm = np.exp(0.3 * rng.standard_normal(steps))  # log-normal spread, median 1
    return [{"loss": float(a), "grad_norm": float(g)} for a, g in zip(loss, grad_norm)]


def run(detector, series):
    return [(step, r) for step, s in enumerate(series) if (r := detector.observe(step, s)) is not None]


@pytest.mark.parametrize("make", [NonFinite, LossSpike, GradExplosion, InitialRise])
def test_quiet_on_a_healthy_run(make):
    d = make()
    assert run(d, healthy()) == []
    assert d.fired == 0


def test_nonfinite_fires_on_nan_loss_and_inf_grad():
    series = healthy(200)
    series[123]["loss"] = math.nan
    series[150]["grad_norm"] = math.inf
    fired = run(NonFinite(), series)
    assert [s for s, _ in fired] == [123, 150]
    assert "loss is nan" in fired[0][1] and "grad_norm is inf" in fired[1][1]


def test_loss_spike_fires_on_a_jump():
    series = healthy(600)
    series[400]["loss"] *= 3.0
    fired = run(LossSpike(), series)
    assert [s for s, _ in fired] == [400]


def test_loss_spike_threshold_is_the_robust_z():
    # 50 steps alternating 1.0 / 1.2, checked only once all 50 are in: median 1.1, MAD 0.1,
    # robust sigma 0.14826 (MAD × 1.4826 is the Gaussian sigma; Rousseeuw and Croux 1993, from memory).
    base = [{"loss": 1.0 + 0.2 * (i % 2)} for i in range(50)]
    sigma = 0.1 * 1.4826
    below, above = (LossSpike(threshold=6.0, ratio=1.0, share=0.0, window=50, min_history=50) for _ in range(2))
    assert run(below, base + [{"loss": 1.1 + 5.9 * sigma}]) == []
    assert [s for s, _ in run(above, base + [{"loss": 1.1 + 6.1 * sigma}])] == [50]


def test_grad_explosion_factor_and_min_history():
    base = [{"grad_norm": 1.0} for _ in range(30)]
    assert run(GradExplosion(factor=10.0), base + [{"grad_norm": 9.5}]) == []
    assert [s for s, _ in run(GradExplosion(factor=10.0), base + [{"grad_norm": 10.5}])] == [30]
    # Before min_history steps there is no baseline: a huge first value stays quiet.
    assert run(GradExplosion(min_history=20), base[:19] + [{"grad_norm": 1e6}]) == []


def test_state_survives_resume():
    series = healthy(600)
    series[400]["loss"] *= 3.0
    first = LossSpike()
    run(first, series[:300])
    resumed = LossSpike()
    resumed.load_state_dict(first.state_dict())
    fired = [(s, r) for s, x in enumerate(series) if s >= 300 and (r := resumed.observe(s, x))]
    assert [s for s, _ in fired] == [400]
    assert len(resumed.history) == 50  # the window is bounded


def test_build_from_the_default_config():
    cfg = composed("telemetry", "default")
    check_telemetry(cfg)
    kinds = [type(d) for d in build_detectors(cfg)]
    assert kinds == [NonFinite, LossSpike, GradExplosion, OverflowStorm, ScaleCollapse, InitialRise]
    spike = build_detectors(cfg)[1]
    assert (spike.threshold, spike.ratio, spike.share, spike.window, spike.min_history) == (6.0, 2.0, 0.2, 50, 20)


def test_null_disables():
    cfg = OmegaConf.create({"detect": {"nonfinite": False, "spike_z": None, "grad_factor": 5.0, "skip_storm": None, "scale_floor": None, "initial_factor": None}})
    (only,) = build_detectors(cfg)
    assert isinstance(only, GradExplosion) and only.factor == 5.0


@pytest.mark.parametrize(
    "cfg, key",
    [
        ({"detect": {"spike_z": -1.0}}, "telemetry.detect.spike_z"),
        ({"detect": {"grad_factor": 1.0}}, "telemetry.detect.grad_factor"),
        ({"detect": {"nonfinite": "yes"}}, "telemetry.detect.nonfinite"),
        ({"detect": {"spike_window": 10}}, "telemetry.detect.spike_window"),  # below min_history=20
        ({"detect": {"spike_zz": 3.0}}, "telemetry.detect.spike_zz"),
        ({"detect": {"spike_ratio": 0.5}}, "telemetry.detect.spike_ratio"),
        ({"detect": {"spike_share": 1.5}}, "telemetry.detect.spike_share"),
        ({"detect": {"initial_factor": 1.0}}, "telemetry.detect.initial_factor"),
        ({"on_trigger": "halt"}, "telemetry.on_trigger"),
        ({"layer_every": -1}, "telemetry.layer_every"),
        ({"flush_every": 0}, "telemetry.flush_every"),
        ({"noise_decay": 1.5}, "telemetry.noise_decay"),
        ({"incident": {"factor": 0.5}}, "telemetry.incident.factor"),
        ({"detect": {"skip_storm": 0}}, "telemetry.detect.skip_storm"),
        ({"detect": {"skip_storm": 8, "skip_window": 5}}, "telemetry.detect.skip_window"),
        ({"detect": {"scale_floor": -1.0}}, "telemetry.detect.scale_floor"),
    ],
)
def test_bad_config_names_the_key(cfg, key):
    with pytest.raises(ConfigError) as err:
        check_telemetry(OmegaConf.create(cfg))
    assert err.value.key == key


def test_overflow_storm_counts_skips_in_its_window_and_fires_once_per_storm():
    storm = OverflowStorm(count=3, window=10)
    skipped = {0, 1, 20, 25, 31, 40, 41, 42, 43, 44, 45}  # 20, 25, 31: never 3 within 10 steps
    fired = [s for s in range(60) if storm.observe(s, {"skipped": float(s in skipped), "loss_scale": 8.0})]
    assert fired == [42, 45]  # 40-42 is a storm; after firing the count starts again: 43-45
    resumed = OverflowStorm(count=3, window=10)
    resumed.load_state_dict(OverflowStorm(count=3, window=10, recent=[40, 41]).state_dict())
    assert resumed.observe(42, {"skipped": 1.0}) is not None


def test_scale_collapse_fires_when_the_scale_crosses_the_floor():
    collapse = ScaleCollapse(floor=1.0)
    scales = [4.0, 2.0, 1.0, 0.5, 0.25, 2.0, 0.5]
    fired = [s for s, v in enumerate(scales) if collapse.observe(s, {"loss_scale": v})]
    assert fired == [3, 6]  # crossing down twice; staying below does not fire again
    assert collapse.observe(7, {"loss": 1.0}) is None  # runs without loss scaling log no scale


def converged(steps=300, seed=0):
    """A loss that fell from 2.3 to ~0.01 and stays there with heavy-tailed batch noise: most
    batches near 0.006, one in ~25 holding a misfit sample at 5-10x that (as a trained digits
    classifier shows), and gradient norms with the same kind of tail."""
    rng = np.random.default_rng(seed)
    series = [{"loss": 2.3, "grad_norm": 1.2}]
    for _ in range(steps):
        misfit = rng.random() < 0.04
        loss = 0.006 * (1 + 0.3 * rng.standard_normal()) * (rng.uniform(5, 10) if misfit else 1.0)
        grad = 0.05 * np.exp(0.3 * rng.standard_normal()) * (rng.uniform(8, 14) if misfit else 1.0)
        series.append({"loss": abs(loss), "grad_norm": grad})
    return series


def test_no_alarm_near_convergence_but_the_z_score_alone_would_fire():
    series = converged()
    assert run(LossSpike(), series) == [] and run(GradExplosion(), series) == []
    # Without the floors, the same series trips: the tiny MAD turns ordinary misfit batches into many sigmas.
    assert run(LossSpike(ratio=1.0, share=0.0), series) != []
    assert run(GradExplosion(first=0.0), series) != []


def test_a_real_spike_near_convergence_still_fires():
    series = converged()
    series[200]["loss"] = 0.6  # gives back 0.59/2.29 = 26% of the fall: past the 20% share
    assert [s for s, _ in run(LossSpike(), series)] == [200]
    small = converged()
    small[200]["loss"] = 0.1  # 16x the median, but only 4% of the fall
    assert run(LossSpike(), small) == []


def test_ratio_floor():
    base = [{"loss": 1.0 + 0.01 * (i % 2)} for i in range(50)]  # median 1.005, robust sigma 0.0074
    assert run(LossSpike(ratio=2.0, share=0.0, min_history=50), base + [{"loss": 1.9}]) == []  # 120 sigma, 1.89x
    assert [s for s, _ in run(LossSpike(ratio=2.0, share=0.0, min_history=50), base + [{"loss": 2.1}])] == [50]


def test_initial_rise_fires_before_any_window_is_ready():
    series = [{"loss": 13.1}, {"loss": 12.9}, {"loss": 20.0}, {"loss": 27.0}, {"loss": 146.0}]
    fired = run(InitialRise(factor=2.0), series)
    assert [s for s, _ in fired] == [3, 4]  # 27.0 > 2 × 13.1, the median of the first three; 20.0 is not
    assert "first losses' median 13.1" in fired[0][1]
    lucky = [{"loss": 0.25}, {"loss": 3.3}, {"loss": 2.4}, {"loss": 2.7}, {"loss": 1.3}]  # a noisy task's low first batch
    assert run(InitialRise(factor=2.0), lucky) == []
    resumed = InitialRise(factor=2.0)
    resumed.load_state_dict(InitialRise(factor=2.0, initial=[13.1, 12.9, 20.0]).state_dict())
    assert resumed.observe(9, {"loss": 26.3}) is not None
    # A run taken over at step 12 (adopt: no detector state) starts near its converged loss: the rule
    # against the start of training does not apply, and its state says so across a resume.
    adopted = InitialRise(factor=3.0)
    assert [adopted.observe(12 + i, {"loss": v}) for i, v in enumerate([0.03, 0.028, 0.035, 0.12, 0.26])] == [None] * 5
    again = InitialRise(factor=3.0)
    again.load_state_dict(adopted.state_dict())
    assert again.off and again.observe(20, {"loss": 0.5}) is None


def test_check_before_observe_gives_observes_verdict_and_changes_nothing():
    """The engine asks `check` before the update (to keep the weights the per-worker rerun needs)
    and the monitor then calls `observe`: on a run with spikes, explosions, NaNs, skipped steps
    and a collapsing loss scale, both say the same on every step, and `check` leaves the state."""
    rng = np.random.default_rng(3)
    series = healthy(400, seed=1)
    for step in (60, 61, 150, 250):
        series[step] = dict(series[step], loss=series[step]["loss"] * 9)
    for step in (90, 200):
        series[step] = dict(series[step], grad_norm=40.0)
    series[300] = dict(series[300], loss=float("nan"))
    for step, s in enumerate(series):
        s["loss_scale"] = 2.0 ** (8 - step // 40)  # falls below 1 at step 360
        if rng.random() < 0.3 or 340 <= step < 352:
            s["skipped"] = 1.0
    early = [{"loss": v} for v in (2.0, 2.1, 1.9, 7.0)] + series  # the initial rise fires at step 3
    detectors = [NonFinite(), LossSpike(), GradExplosion(), InitialRise(), OverflowStorm(), ScaleCollapse()]
    fired = {type(d).__name__: [] for d in detectors}
    for step, s in enumerate(early):
        for d in detectors:
            before = repr(d.state_dict())
            said = d.check(step, s)
            assert repr(d.state_dict()) == before
            assert said == d.observe(step, s), (type(d).__name__, step)
            if said:
                fired[type(d).__name__].append(step)
    assert fired["NonFinite"] == [304] and fired["InitialRise"][0] == 3
    assert 64 in fired["LossSpike"] and 94 in fired["GradExplosion"] and fired["ScaleCollapse"] == [364]
    assert fired["OverflowStorm"]  # ten skips within 50 steps
