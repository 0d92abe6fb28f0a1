import math

import numpy as np
import pytest

from scaledrill.config.rules import check_telemetry
from scaledrill.errors import ConfigError
from scaledrill.telemetry.noise_scale import NoiseScale, estimate_g2, estimate_trace

# A synthetic problem with known answers: d coordinates, true gradient G with
# |G|² = 1, per-example noise of variance SIGMA2 in every coordinate (Rademacher,
# so nothing relies on Gaussian noise), hence tr(Σ) = d·SIGMA2 = 32 and B_simple = 32.
D, SIGMA2 = 16, 2.0
G = np.full(D, 0.25)
TRUE_G2, TRUE_TRACE = float(G @ G), D * SIGMA2
W, B = 8, 4  # workers and per-worker batch: B_small = 4, B_big = 32


def draw_norms(rng, trials):
    """The two squared norms a data-parallel step sees, for `trials` independent steps."""
    signs = rng.choice([-1.0, 1.0], size=(trials, W, B, D))
    per_example = G + math.sqrt(SIGMA2) * signs
    per_worker = per_example.mean(axis=2)  # each worker's gradient over its b samples
    small_sq = (per_worker**2).sum(-1).mean(-1)  # MEAN over workers of |G_worker|²
    big_sq = (per_worker.mean(axis=1) ** 2).sum(-1)  # |averaged gradient|²
    return small_sq, big_sq


def test_raw_estimators_are_unbiased():
    rng = np.random.default_rng(0)
    small_sq, big_sq = draw_norms(rng, 20_000)
    g2 = estimate_g2(small_sq, B, big_sq, W * B)
    trace = estimate_trace(small_sq, B, big_sq, W * B)
    n = len(g2)
    se_g2, se_tr = g2.std() / math.sqrt(n), trace.std() / math.sqrt(n)
    # Unbiasedness from E|G_B|² = |G|² + tr(Σ)/B (McCandlish et al. 2018, arXiv 1812.06162, app. A).
    # Tolerance: 5 Monte-Carlo standard errors, a chance failure below 1e-6 (normal approximation).
    assert abs(g2.mean() - TRUE_G2) < 5 * se_g2
    assert abs(trace.mean() - TRUE_TRACE) < 5 * se_tr
    # The test has power: the bound is tight, and the naive |G_big|² (biased by tr(Σ)/B_big = 1)
    # would fail it.
    assert 5 * se_g2 < 0.1 * TRUE_G2 and 5 * se_tr < 0.02 * TRUE_TRACE
    assert abs(big_sq.mean() - TRUE_G2) > 5 * se_g2


def test_smoothed_b_simple_converges():
    rng = np.random.default_rng(1)
    decay, steps = 0.99, 3000
    small_sq, big_sq = draw_norms(rng, steps)
    ns = NoiseScale(decay=decay)
    for s, b in zip(small_sq, big_sq):
        ns.update(float(s), B, float(b), W * B)
    true_b = TRUE_TRACE / TRUE_G2  # B_simple = tr(Σ)/|G|² (McCandlish et al. 2018, arXiv 1812.06162, definition of B_simple)
    # Tolerance: delta-method std of a ratio of two EMAs (variance factor (1-d)/(1+d)), times 5.
    g2 = estimate_g2(small_sq, B, big_sq, W * B)
    tr = estimate_trace(small_sq, B, big_sq, W * B)
    c = np.cov(tr, g2)
    rel_var = c[0, 0] / TRUE_TRACE**2 + c[1, 1] / TRUE_G2**2 - 2 * c[0, 1] / (TRUE_TRACE * TRUE_G2)
    tol = 5 * true_b * math.sqrt(rel_var * (1 - decay) / (1 + decay))
    assert tol < 0.5 * true_b  # a meaningful bound
    assert abs(ns.b_simple - true_b) < tol
    assert ns.updates == steps and ns.skipped == 0


def test_first_update_is_the_raw_estimate():
    # The start-up bias of the EMA is divided out, so one step gives the one-step estimate.
    ns = NoiseScale(decay=0.95)
    ns.update(3.0, 4, 1.5, 32)
    assert ns.g2 == pytest.approx((32 * 1.5 - 4 * 3.0) / 28, rel=1e-12)
    assert ns.trace == pytest.approx((3.0 - 1.5) / (1 / 4 - 1 / 32), rel=1e-12)
    assert ns.b_simple == pytest.approx(ns.trace / ns.g2, rel=1e-12)


def test_resume_is_exact():
    rng = np.random.default_rng(2)
    small_sq, big_sq = draw_norms(rng, 60)
    whole, first = NoiseScale(), NoiseScale()
    for s, b in zip(small_sq, big_sq):
        whole.update(float(s), B, float(b), W * B)
    for s, b in zip(small_sq[:30], big_sq[:30]):
        first.update(float(s), B, float(b), W * B)
    resumed = NoiseScale()
    resumed.load_state_dict(first.state_dict())
    for s, b in zip(small_sq[30:], big_sq[30:]):
        resumed.update(float(s), B, float(b), W * B)
    assert resumed.state_dict() == whole.state_dict()
    assert all(isinstance(v, (int, float)) for v in whole.state_dict().values())


def test_undefined_while_signal_is_negative_and_nan_is_skipped():
    ns = NoiseScale()
    assert ns.b_simple is None and math.isnan(ns.g2)
    assert ns.update(10.0, 1, 0.1, 10) is None  # |G|² estimate (1 − 10)/9 = −1 < 0
    assert math.isnan(ns.scalars()["b_simple"])
    before = ns.state_dict()
    ns.update(math.nan, 1, 0.1, 10)
    assert ns.skipped == 1 and ns.g2_sum == before["g2_sum"] and ns.updates == 1


def test_bad_inputs():
    with pytest.raises(ConfigError, match="telemetry.noise_decay"):
        check_telemetry({"noise_decay": 1.0})  # config/rules.py, before a NoiseScale is built
    with pytest.raises(ValueError):
        NoiseScale().update(1.0, 8, 1.0, 8)  # one worker: the two batch sizes coincide
