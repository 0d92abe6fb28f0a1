"""`scaledrill replay`: variants from a checkpoint, bitwise continuation, the divergence demo."""

import json

import numpy as np
import pytest
import torch

from conftest import make_config
from scaledrill.commands.replay import replay_verb
from scaledrill.errors import ConfigError
from scaledrill.telemetry.store import read_scalars
from scaledrill.train.run import run_verb

SMALL = ["task=teacher", "layout.workers=4", "layout.micro_batch=8", "train.steps=12", "train.checkpoint_every=4",
         "train.eval_every=0", "train.progress=false", "optim.lr=0.05"]


def _replay(tmp_path, source, *overrides):
    cfg = make_config(f"replay.from={source}", *overrides, name="replay")
    replay_verb(cfg, tmp_path / "replay")
    return json.loads((tmp_path / "replay" / "replay.json").read_text())


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    run_dir = tmp_path_factory.mktemp("orig") / "run"
    summary = run_verb(make_config(*SMALL), run_dir)
    return run_dir, summary


def test_two_variants_and_a_bitwise_original(tmp_path, small_run):
    run_dir, straight = small_run
    steps, loss = read_scalars(run_dir / "run.sqlite")["loss"]
    logged = np.where(steps < 9, loss, loss * 1.5)  # a cluster log that follows the run, then departs at step 9
    log = tmp_path / "job.csv"
    log.write_text("step,loss,wall\n" + "".join(f"{s},{float(x)!r},0\n" for s, x in zip(steps, logged)))
    out = _replay(tmp_path, run_dir / "checkpoints" / "step-0000004.pt",
                  '+replay.variants.slow=["optim.lr=0.01"]', "+replay.variants.clip='optim.clip_norm=0.01'",
                  f"replay.cluster_log={log}")

    assert out["from_step"] == 4 and out["checkpoint"].endswith("step-0000004.pt")
    assert [v["name"] for v in out["variants"]] == ["original", "slow", "clip"]
    assert out["variants"][1]["overrides"] == ["optim.lr=0.01"]
    assert out["departure_step"] == 9 and out["cluster_log"] == str(log)
    for v in out["variants"]:
        summary = json.loads((tmp_path / "replay" / v["run_dir"] / "summary.json").read_text())
        assert summary["resumed_from_step"] == 4 and summary["final_loss"] == v["final_loss"]
        assert summary["steps"] == 12 or (v["diverged"] and "rise" in summary["stop_reason"])  # a detector stops it early
    # Clipping to 0.01 under momentum 0.9 leaves the loss climbing every step (10 -> 37 by step 10, measured):
    # past 3x the median of the run's first three losses, which the initial-loss rule calls a divergence.
    assert [v["diverged"] for v in out["variants"]] == [False, False, True]
    original = json.loads((tmp_path / "replay" / "variant-original" / "summary.json").read_text())
    # The original continuation is the uninterrupted run, bit for bit.
    assert original["final_loss"] == straight["final_loss"]
    assert original["final_params_l2"] == straight["final_params_l2"]
    replayed = read_scalars(tmp_path / "replay" / "variant-original" / "run.sqlite")["loss"]
    assert replayed[0].tolist() == list(range(4, 12))
    assert replayed[1].tolist() == loss[4:].tolist()
    a = torch.load(run_dir / "checkpoints" / "step-0000012.pt", weights_only=True)["model"]
    b = torch.load(tmp_path / "replay" / "variant-original" / "checkpoints" / "step-0000012.pt", weights_only=True)["model"]
    assert all(torch.equal(a[k], b[k]) for k in a)
    # The variants really changed something.
    assert out["variants"][1]["final_loss"] != straight["final_loss"]
    assert out["variants"][2]["final_loss"] != straight["final_loss"]
    assert (tmp_path / "replay" / "replay.png").stat().st_size > 10_000


def test_a_variant_may_not_change_the_layout(tmp_path, small_run):
    run_dir, _ = small_run
    with pytest.raises(ConfigError) as err:
        _replay(tmp_path, run_dir, "replay.steps=16", '+replay.variants.big=["layout.workers=8"]')
    assert err.value.key == "replay.variants.big"
    assert "changes layout.workers to 8, but the checkpoint was made with 4" in str(err.value)
    assert not (tmp_path / "replay" / "variant-original").exists()  # refused before anything trained


def test_divergence_demo_is_rescued_from_a_checkpoint(tmp_path):
    run_dir = tmp_path / "blowup"
    blown = run_verb(make_config("+scenario=divergence", "train.progress=false"), run_dir)
    assert blown["diverged"] and 15 < blown["steps"] <= 40 and blown["incidents"]  # after the 15-step warmup
    out = _replay(tmp_path, run_dir, "replay.steps=60", "+replay.variants.clip='optim.clip_norm=2.0'",
                  "+replay.variants.sqrt='scaling.rule=sqrt'")
    assert out["from_step"] < blown["steps"] - 1  # the run directory gives the newest checkpoint before the trigger
    by_name = {v["name"]: v for v in out["variants"]}
    assert by_name["original"]["diverged"] and by_name["original"]["final_loss"] == blown["final_loss"]  # replayed exactly
    steps, loss = read_scalars(run_dir / "run.sqlite")["loss"]
    plateau = float(np.median(loss[(steps >= 10) & (steps < out["from_step"])]))  # where the too-high lr holds it: ~7.4
    assert by_name["clip"]["diverged"]  # clipping the norm at 2 does not stop this spike
    assert not by_name["sqrt"]["diverged"]
    assert by_name["sqrt"]["final_loss"] < 0.6 * plateau  # a peak lr 8x lower leaves the plateau
