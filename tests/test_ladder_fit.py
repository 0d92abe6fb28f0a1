"""The steps/examples trade-off fit (McCandlish et al. 2018) and the regimes."""

import math

import numpy as np
import pytest

from scaledrill.ladder.fit import Fit, fit_tradeoff, predicted_examples, predicted_steps, regime

S_MIN, B_NOISE = 1000.0, 300.0
BATCHES = 2.0 ** np.arange(4, 12)  # 16 .. 2048, spanning B_noise


def model_steps(batches):
    # S = S_min(1 + B_noise/B) — McCandlish et al. 2018, arXiv 1812.06162, eq. for steps
    return S_MIN * (1 + B_NOISE / np.asarray(batches, dtype=float))


def test_exact_data_is_recovered():
    fit = fit_tradeoff(BATCHES, model_steps(BATCHES))
    # tolerance 1e-9 relative: exact data, only rounding in the least squares
    assert fit.s_min == pytest.approx(S_MIN, rel=1e-9)
    assert fit.b_noise == pytest.approx(B_NOISE, rel=1e-9)
    # E_min = S_min·B_noise and B_crit = E_min/S_min (McCandlish et al. 2018)
    assert fit.e_min == pytest.approx(S_MIN * B_NOISE, rel=1e-9)
    assert fit.b_crit == pytest.approx(fit.e_min / fit.s_min, rel=1e-12)
    assert fit.residual < 1e-12


def test_two_rungs_determine_the_line():
    # by hand: S(100) = 1000·(1 + 300/100) = 4000, S(600) = 1000·(1 + 0.5) = 1500
    fit = fit_tradeoff([100, 600], [4000, 1500])
    assert fit.s_min == pytest.approx(1000, rel=1e-9)
    assert fit.b_noise == pytest.approx(300, rel=1e-9)


def test_noisy_steps_recover_s_min_and_b_noise():
    rng = np.random.default_rng(0)
    steps = model_steps(BATCHES) * (1 + rng.normal(0.0, 0.03, BATCHES.size))  # 3% multiplicative noise
    fit = fit_tradeoff(BATCHES, steps)
    # tolerances 8% on S_min and 15% on B_noise: above the 99.9th percentile of the
    # error over 2000 seeds of this exact setup (7.7% and 12.1%)
    assert fit.s_min == pytest.approx(S_MIN, rel=0.08)
    assert fit.b_noise == pytest.approx(B_NOISE, rel=0.15)
    # the relative residual is of the order of the noise, 3%
    assert 0.003 < fit.residual < 0.06


def test_predictions_follow_the_model():
    fit = Fit(s_min=S_MIN, e_min=S_MIN * B_NOISE, b_noise=B_NOISE, b_crit=B_NOISE, residual=0.0)
    # at B = B_crit: S = 2·S_min and E = 2·E_min (McCandlish et al. 2018)
    assert predicted_steps(fit, B_NOISE) == pytest.approx(2 * S_MIN, rel=1e-12)
    assert predicted_examples(fit, B_NOISE) == pytest.approx(2 * S_MIN * B_NOISE, rel=1e-12)
    # by hand: S(60) = 1000·(1 + 300/60) = 6000; E(60) = 6000·60 = 360000
    assert predicted_steps(fit, 60) == pytest.approx(6000, rel=1e-12)
    assert predicted_examples(fit, 60) == pytest.approx(360000, rel=1e-12)


def test_regimes_at_chosen_batches():
    fit = fit_tradeoff(BATCHES, model_steps(BATCHES))  # B_crit = 300
    # thresholds 0.5·B_crit = 150 and 5·B_crit = 1500 (common practice)
    assert regime(100, fit) == "perfect scaling"
    assert regime(149, fit) == "perfect scaling"
    assert regime(151, fit) == "diminishing returns"
    assert regime(300, fit) == "diminishing returns"
    assert regime(1499, fit) == "diminishing returns"
    assert regime(1501, fit) == "plateau"
    # what the thresholds mean under the model: E(0.5·B_crit) = 1.5·E_min, S(5·B_crit) = 1.2·S_min
    assert predicted_examples(fit, 150) / fit.e_min == pytest.approx(1.5, rel=1e-9)
    assert predicted_steps(fit, 1500) / fit.s_min == pytest.approx(1.2, rel=1e-9)


def test_steps_falling_as_one_over_b_never_plateau():
    batches = [32, 64, 128, 256]
    fit = fit_tradeoff(batches, [64000 / b for b in batches])  # S = 64000/B exactly
    assert fit.s_min == 0.0 and math.isinf(fit.b_noise)
    assert fit.e_min == pytest.approx(64000, rel=1e-9)
    assert predicted_steps(fit, 1000) == pytest.approx(64, rel=1e-9)
    assert regime(1e9, fit) == "perfect scaling"


def test_flat_steps_are_a_plateau_everywhere():
    fit = fit_tradeoff([32, 64, 128], [500, 500, 500])
    assert fit.s_min == pytest.approx(500, rel=1e-9)
    assert fit.b_noise == pytest.approx(0.0, abs=1e-9)
    assert regime(32, fit) == "plateau"


@pytest.mark.parametrize(
    "batches, steps, words",
    [
        ([64], [100], "2 different batch sizes"),
        ([64, 64], [100, 110], "2 different batch sizes"),
        ([64, 128], [100], "differ in length"),
        ([64, 128], [100, 0], "finite and > 0"),
        ([64, 128], [100, float("nan")], "finite and > 0"),
        ([0, 128], [100, 50], "finite and > 0"),
    ],
)
def test_bad_ladders_are_refused(batches, steps, words):
    with pytest.raises(ValueError, match=words):
        fit_tradeoff(batches, steps)
