"""sync.bitwise: one fixed summation tree over worker ids gives bitwise-identical runs across layouts."""

import json
import os
import subprocess

import torch

from conftest import ROOT, SCALEDRILL
from scaledrill.sync.tree import pairwise_sum

RECIPE = ("task=teacher", "task.model.hidden=16", "layout.workers=8", "layout.micro_batch=4", "train.steps=20",
          "train.eval_every=0", "train.progress=false")


def test_pairwise_tree_of_subtree_sums_is_the_whole_tree_bitwise():
    rows = torch.randn(8, 1000, generator=torch.Generator().manual_seed(0)) * torch.logspace(-3, 3, 8).unsqueeze(1)
    whole = pairwise_sum(rows)
    for V in (1, 2, 4, 8):  # P = 8 / V processes, each summing its own block of V rows
        blocks = torch.stack([pairwise_sum(rows[i : i + V]) for i in range(0, 8, V)])
        assert torch.equal(pairwise_sum(blocks), whole)
    plain = rows[:3].sum(0) + rows[3:].sum(0)  # another order: the bits differ, so the test above can fail
    assert not torch.equal(plain, whole)
    assert torch.allclose(whole, rows.double().sum(0).float(), rtol=1e-5, atol=1e-4)  # and it is the sum (float64 reference)


def _start(run_dir, procs: int, bitwise: bool):
    backend = "local" if procs == 1 else "gloo"
    args = [*SCALEDRILL, "run", *RECIPE, f"layout.procs={procs}", f"layout.backend={backend}",
            f"sync.bitwise={'true' if bitwise else 'false'}", f"hydra.run.dir={run_dir}"]
    env = dict(os.environ, OMP_NUM_THREADS="1", SCALEDRILL_THREADS="1")
    return subprocess.Popen(args, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def test_params_digest_is_identical_for_procs_1_2_4_8_and_default_mode_agrees_within_rounding(tmp_path):
    runs = {(p, True): tmp_path / f"tree-p{p}" for p in (1, 2, 4, 8)}
    runs[(2, False)] = tmp_path / "ring-p2"
    started = {key: _start(path, key[0], key[1]) for key, path in runs.items()}
    for key, proc in started.items():
        out, _ = proc.communicate(timeout=600)
        assert proc.returncode == 0, out
    summary = {key: json.loads((path / "summary.json").read_text()) for key, path in runs.items()}
    digests = {p: summary[(p, True)]["params_digest"] for p in (1, 2, 4, 8)}
    assert len(set(digests.values())) == 1, digests  # bitwise the same parameters after 20 steps
    assert summary[(1, True)]["grads"] == "loop"

    def final(path):
        state = torch.load(sorted((path / "checkpoints").glob("step-*.pt"))[-1], weights_only=False)
        return torch.cat([v.double().flatten() for k, v in state["model"].items() if v.is_floating_point()])

    tree, ring = final(runs[(1, True)]), final(runs[(2, False)])
    # Default mode (ring all-reduce, 2 processes): the same run up to float32 summation order,
    # within the check's rounding rule C·u·√B·t·max|θ| (scaledrill.check.tolerance).
    bound = 32 * 2.0**-24 * (8 * 4) ** 0.5 * 20 * float(tree.abs().max())
    assert float((tree - ring).abs().max()) <= bound
