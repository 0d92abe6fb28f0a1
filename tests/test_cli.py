"""The command line as a user meets it: verbs, Hydra overrides, clear errors."""

import json
import subprocess
import textwrap

import pytest

from conftest import SCALEDRILL, run_cli

QUICK = ("train.steps=3", "train.progress=false", "layout.workers=4", "layout.micro_batch=8", "train.eval_every=0")


@pytest.mark.parametrize(
    "overrides, key",
    [
        (("layout.workers=6", "layout.procs=4", "layout.backend=gloo"), "layout.workers"),
        (("layout.backend=nccl",), "layout.backend"),
        (("layout.micro_batch=0",), "layout.micro_batch"),
        (("layout.procs=2",), "layout.procs"),  # local backend with two processes
        (("optim.lr=-1",), "optim.lr"),
        (("train.grads=magic",), "train.grads"),
        (("sync=topk", "sync.fraction=2"), "sync.fraction"),
        (("layout.workers=abc",), "layout.workers"),  # a type error caught by Hydra/OmegaConf
    ],
)
def test_bad_input_fails_naming_the_key_without_traceback(tmp_path, overrides, key):
    done = run_cli("run", *overrides, f"hydra.run.dir={tmp_path}/run")
    assert done.returncode == 2, done.stderr
    assert key in done.stderr
    assert "Traceback" not in done.stderr
    assert not (tmp_path / "run" / "summary.json").exists()


def test_unknown_verb_and_usage():
    done = run_cli("train")
    assert done.returncode == 2 and "unknown verb 'train'" in done.stderr
    assert run_cli("--help").returncode == 0


def test_verb_help_is_in_our_words(tmp_path):
    done = subprocess.run([*SCALEDRILL, "check", "--help"], capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines[0] == "scaledrill check: prove accumulation, virtual workers and processes match the true batch"
    assert "usage: scaledrill check [key=value ...]" in done.stdout and "tolerance_scale: 1.0" in done.stdout
    assert "powered by Hydra" not in done.stdout and not any(tmp_path.iterdir())  # help writes nothing


def test_cfg_job_prints_the_resolved_config():
    done = run_cli("run", "--cfg", "job", "layout.workers=64", "layout.micro_batch=8")
    assert done.returncode == 0, done.stderr
    assert "workers: 64" in done.stdout and "micro_batch: 8" in done.stdout


def test_run_writes_summary_and_refuses_to_overwrite(tmp_path):
    run_dir = tmp_path / "run"
    done = run_cli("run", *QUICK, "layout.accum=2", f"hydra.run.dir={run_dir}", check=True)
    summary = json.loads((run_dir / "summary.json").read_text())
    assert f"finished 3 steps in {summary['wall_seconds']:.1f} s: last train loss {summary['final_loss']:.4g}" in done.stdout
    assert f"outputs: {run_dir}" in done.stdout and f"scaledrill report {run_dir}" in done.stdout
    for key in ("workers", "procs", "micro_batch", "accum", "global_batch", "backend", "steps", "samples_seen",
                "dropped_samples", "final_loss", "eval", "final_params_l2", "wall_seconds"):
        assert key in summary, key
    assert summary["global_batch"] == 4 * 8 * 2 and summary["samples_seen"] == 3 * 64
    assert 0 < summary["final_loss"] < 5 and 0 <= summary["eval"]["accuracy"] <= 1
    before = (run_dir / "summary.json").read_bytes()
    again = run_cli("run", *QUICK, f"hydra.run.dir={run_dir}")
    assert again.returncode == 2 and "already holds a finished run" in again.stderr
    assert (run_dir / "summary.json").read_bytes() == before  # nothing already written is lost


def test_multirun_sweeps_the_learning_rate(tmp_path):
    done = run_cli("run", "-m", *QUICK, "optim.lr=0.05,0.2", f"hydra.sweep.dir={tmp_path}")
    assert done.returncode == 0, done.stderr
    summaries = sorted(tmp_path.glob("*/summary.json"))
    assert len(summaries) == 2
    peaks = sorted(json.loads(p.read_text())["peak_lr"] for p in summaries)
    assert peaks == [0.05, 0.2]


def test_user_model_from_outside_the_package(tmp_path):
    (tmp_path / "mymodels.py").write_text(textwrap.dedent("""
        import torch
        class Flat(torch.nn.Module):
            def __init__(self, hidden):
                super().__init__()
                self.net = torch.nn.Sequential(torch.nn.Flatten(), torch.nn.Linear(64, hidden), torch.nn.Tanh(), torch.nn.Linear(hidden, 10))
            def forward(self, x):
                return self.net(x)
    """))
    run_dir = tmp_path / "run"
    done = run_cli("run", *QUICK, "~task.model", "+task.model._target_=mymodels.Flat", "+task.model.hidden=12",
                   f"hydra.run.dir={run_dir}", env={"PYTHONPATH": str(tmp_path)})
    assert done.returncode == 0, done.stderr
    summary = json.loads((run_dir / "summary.json").read_text())
    # 64·12 + 12 + 12·10 + 10 parameters, all from the user's module
    import torch
    state = torch.load(run_dir / "checkpoints" / "step-0000003.pt", weights_only=True)
    assert sum(v.numel() for v in state["model"].values()) == 64 * 12 + 12 + 12 * 10 + 10
    assert summary["steps"] == 3


def test_user_target_that_does_not_import(tmp_path):
    done = run_cli("run", *QUICK, "task.model._target_=nowhere.Net", f"hydra.run.dir={tmp_path}/run")
    assert done.returncode == 2
    assert "task.model._target_" in done.stderr and "nowhere.Net" in done.stderr
    assert "Traceback" not in done.stderr


def test_recipe_prints_and_writes_recipe_json(tmp_path):
    done = run_cli("recipe", "scaling=linear", "scaling.base_batch=256", "scaling.base_lr=0.1", "layout.workers=256",
                   "layout.micro_batch=32", "task=teacher", f"hydra.run.dir={tmp_path}")
    assert done.returncode == 0, done.stderr
    recipe = json.loads((tmp_path / "recipe.json").read_text())
    # Goyal et al. 2017: 0.1 per 256 samples, so B = 8192 gives a peak lr of 3.2
    assert recipe["global_batch"] == 8192 and recipe["peak_lr"] == pytest.approx(3.2)
    for key in ("warmup_steps", "steps_per_epoch", "total_steps"):
        assert key in recipe
    assert not (tmp_path / "summary.json").exists()  # trains nothing


def test_a_diverged_run_says_where_it_broke_and_how_to_replay(tmp_path):
    run_dir = tmp_path / "blowup"
    done = run_cli("run", "+scenario=divergence", "train.progress=false", f"hydra.run.dir={run_dir}", check=True)
    summary = json.loads((run_dir / "summary.json").read_text())
    assert summary["diverged"]
    assert f"diverged after {summary['steps']} steps (loss spike at step" in done.stdout
    assert f"incident report: {summary['incidents'][0]}" in done.stdout
    assert f"scaledrill replay replay.from={run_dir} " in done.stdout  # replay picks the checkpoint before the trigger


@pytest.mark.parametrize("backend, procs", [("local", 1), ("gloo", 2)])
def test_an_unexpected_error_is_one_paragraph_with_the_status_of_a_failed_rank(tmp_path, backend, procs):
    done = run_cli("run", "~task.model", "+task.model._target_=tests.zoo.FailsInEval", "layout.workers=2",
                   f"layout.procs={procs}", f"layout.backend={backend}", "train.steps=2", "train.eval_every=1",
                   "train.progress=false", f"hydra.run.dir={tmp_path}")
    assert done.returncode == 5, done.stderr
    assert "boom in eval" in done.stderr and "Traceback" not in done.stderr
