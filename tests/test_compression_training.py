"""Compression in training: top-k at 1% with error feedback stays close to exact averaging;
without error feedback it is measurably worse (Stich, Cordonnier, Jaggi 2018; Karimireddy
et al. 2019: error feedback recovers the convergence that biased compressors lose)."""

from conftest import make_config
from scaledrill.dist import LocalCollective
from scaledrill.train.engine import run_training

RECIPE = ("task=digits", "layout.workers=8", "layout.micro_batch=16", "train.steps=400", "train.eval_every=0", "telemetry.noise_every=0")


def _eval(*overrides):
    summary = run_training(make_config(*RECIPE, *overrides), LocalCollective())
    return summary


def test_topk_with_error_feedback_tracks_exact_and_without_it_lags():
    exact = _eval()
    with_ef = _eval("sync=topk", "sync.fraction=0.01", "sync.error_feedback=true")
    without = _eval("sync=topk", "sync.fraction=0.01", "sync.error_feedback=false")
    acc = {name: s["eval"]["accuracy"] for name, s in (("exact", exact), ("ef", with_ef), ("no_ef", without))}
    loss = {name: s["eval"]["loss"] for name, s in (("exact", exact), ("ef", with_ef), ("no_ef", without))}
    message = f"test accuracy {acc}, test loss {loss}"
    # Stated margin: within 3 points of accuracy of exact averaging after 400 steps.
    assert acc["ef"] >= acc["exact"] - 0.03, message
    # Without error feedback: at least 3 points less accurate and twice the test loss of the run with it.
    assert acc["no_ef"] <= acc["ef"] - 0.03, message
    assert loss["no_ef"] >= 2 * loss["ef"], message
    # the wire accounting saw the compression: 1% of the values plus their indices
    assert with_ef["compression_ratio"] > 40 and exact["compression_ratio"] == 1.0
    assert 0 < with_ef["mean_cosine_to_exact"] < 1
