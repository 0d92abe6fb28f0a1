"""Layout invariance, the project's central promise: the same 8-worker recipe laid out
as 1, 2, 4 or 8 processes, on local, gloo and mpi, computes the same thing."""

import shutil

import pytest
import torch

from conftest import run_cli

STEPS = 5
RECIPE = ("task=digits", "layout.workers=8", "layout.micro_batch=8", f"train.steps={STEPS}", "train.progress=false", "train.eval_every=0")

# float32: a layout changes only the order in which the 8 worker gradients are summed
# (in-process, then across processes). Each sum of 8 terms differs by at most
# 7·u·Σ|g| with u = 2^-24 (standard summation error bound); over 5 momentum-SGD steps
# this reaches parameters through lr·Σ(momentum powers) < 5 per step, so the
# parameters may differ by ~ 5·5·7·u·|g|max ≈ 1e-5·|θ|max at most; we allow 2e-5.
RTOL = 2e-5


def _final_params(run_dir):
    state = torch.load(run_dir / "checkpoints" / f"step-{STEPS:07d}.pt", weights_only=True)
    return torch.cat([v.double().reshape(-1) for k, v in state["model"].items() if v.is_floating_point()])


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    run_dir = tmp_path_factory.mktemp("local") / "run"
    run_cli("run", *RECIPE, "layout.backend=local", f"hydra.run.dir={run_dir}", check=True)
    return _final_params(run_dir)


CASES = [("gloo", 2), ("gloo", 4), ("gloo", 8), ("mpi", 2), ("mpi", 4)]
if shutil.which("mpiexec") is None:
    import sys
    from pathlib import Path

    if not (Path(sys.executable).parent / "mpiexec").exists():
        CASES = [c for c in CASES if c[0] != "mpi"]


@pytest.mark.parametrize("backend, procs", CASES)
def test_same_parameters_on_every_layout(reference, tmp_path, backend, procs):
    run_dir = tmp_path / "run"
    run_cli("run", *RECIPE, f"layout.backend={backend}", f"layout.procs={procs}", f"hydra.run.dir={run_dir}", check=True)
    params = _final_params(run_dir)
    scale = reference.abs().max()
    assert (params - reference).abs().max() <= RTOL * scale, float((params - reference).abs().max() / scale)
    assert not torch.equal(reference, torch.zeros_like(reference))
