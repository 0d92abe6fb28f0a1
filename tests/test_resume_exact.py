"""A resumed run repeats the uninterrupted one bit for bit, whichever step it resumed at, on the
models users bring: the first noise step of a run decides once which per-worker route serves the
model (rules, vmap or loop), and no step may keep that trial's result, or the run's bits would
depend on where it (re)started. Each case stops before a noise step, so the resumed run's first
noise step is the uninterrupted run's second."""

import pytest
import torch

from conftest import make_config
from scaledrill.dist import LocalCollective
from scaledrill.train.engine import run_training

COMMON = ("layout.workers=4", "layout.micro_batch=8", "train.progress=false", "train.eval_every=0",
          "telemetry.noise_every=4", "train.checkpoint_every=0")
STOP, TOTAL = 6, 10  # noise steps at 0, 4 | 8


def zoo_model(name: str) -> tuple[str, ...]:
    return ("task=digits", "~task.model", f"+task.model._target_=zoo.{name}")


CASES = {
    "teacher, rules route": ("task=teacher",),
    "teacher, vmap path": ("task=teacher", "train.grads=vmap"),
    "teacher, powersgd": ("task=teacher", "sync=powersgd"),
    "teacher, fp16": ("task=teacher", "train.precision=fp16", "train.loss_scale=dynamic"),
    "BatchNorm MLP": zoo_model("BatchNormMLP"),
    "GRU (loop, sampled workers)": zoo_model("PaddedGRU"),
    "transformer with dropout": zoo_model("TransformerDropout"),
    "shared LayerNorm": zoo_model("SharedLayerNorm"),
}


def _final_state(run_dir, steps: int) -> dict:
    return torch.load(run_dir / "checkpoints" / f"step-{steps:07d}.pt", weights_only=True)["model"]


@pytest.mark.parametrize("case", CASES)
def test_resume_matches_the_uninterrupted_run_bitwise(case, tmp_path):
    args = (*COMMON, *CASES[case])
    first, resumed, straight = tmp_path / "first", tmp_path / "resumed", tmp_path / "straight"
    for folder in (first, resumed, straight):
        folder.mkdir()
    run_training(make_config(*args, f"train.steps={STOP}"), LocalCollective(), run_dir=first)
    run_training(make_config(*args, f"train.steps={TOTAL}", f"resume={first / 'checkpoints'}"), LocalCollective(), run_dir=resumed)
    summary = run_training(make_config(*args, f"train.steps={TOTAL}"), LocalCollective(), run_dir=straight)
    assert summary["steps"] == TOTAL and not summary["diverged"]
    a, b = _final_state(resumed, TOTAL), _final_state(straight, TOTAL)
    assert list(a) == list(b)
    different = [key for key in b if not torch.equal(a[key], b[key])]
    assert different == [], f"{case}: resumed at step {STOP} differs from the uninterrupted run in {different}"
