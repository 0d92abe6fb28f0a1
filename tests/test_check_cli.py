"""`scaledrill check` through the command line: real processes (gloo, and mpi where present), exit 0/1/2."""

import json

from conftest import run_cli

TEACHER = ("task=teacher", "task.model.hidden=16", "layout.workers=4", "layout.micro_batch=4", "layout.accum=2", "check.steps=2")


def test_real_processes_match_and_exit_0(tmp_path):
    done = run_cli("check", *TEACHER, "check.paths=[accumulation,processes]", f"hydra.run.dir={tmp_path}")
    assert done.returncode == 0, done.stdout + done.stderr
    report = json.loads((tmp_path / "check.json").read_text())
    ran = [p["name"] for p in report["paths"]]
    assert "processes:gloo" in ran and ran[0] == "accumulation"
    # Each path against the float64 plain-autograd reference: rounding only.
    assert all(x["max_rel"] < 1e-4 for p in report["paths"] for x in p["layers"])
    assert "MATCH" in done.stdout


def test_mismatch_exits_1_and_bad_input_exits_2(tmp_path):
    done = run_cli("check", *TEACHER, "check.paths=[accumulation]", "check.tolerance_scale=1e-7", f"hydra.run.dir={tmp_path / 'a'}")
    assert done.returncode == 1, done.stdout + done.stderr
    assert json.loads((tmp_path / "a" / "check.json").read_text())["verdict"] == "mismatch"
    bad = run_cli("check", *TEACHER, "check.batchnorm=sometimes", f"hydra.run.dir={tmp_path / 'b'}")
    assert bad.returncode == 2 and "check.batchnorm" in bad.stderr


def test_a_custom_step_runs_in_real_processes(tmp_path):
    # the user's step on P = 2 processes of V = 2 thread-workers, against the float64 plain-autograd reference
    done = run_cli("check", *TEACHER, "+check.step._target_=tests.fixtures_check.good_step",
                   "check.paths=[fused,processes]", "check.backends=[gloo,mpi]", f"hydra.run.dir={tmp_path}")  # fmt: skip
    assert done.returncode == 0, done.stdout + done.stderr
    report = json.loads((tmp_path / "check.json").read_text())
    ran = [p["name"] for p in report["paths"]]
    assert "step:processes:gloo" in ran and "step:workers" in ran
    assert "step:processes:mpi" in ran or "step:processes:mpi" in report.get("skipped", {})
    assert all(x["max_rel"] < 1e-4 for p in report["paths"] for x in p["layers"])
    assert (tmp_path / "step-processes-gloo" / "config.yaml").is_file()


def test_a_wrong_custom_step_is_caught_in_real_processes(tmp_path):
    # syncs after the first micro-step only: the later micro-batches' gradients stay on each worker
    done = run_cli("check", *TEACHER, "+check.step._target_=tests.fixtures_check.sync_first_micro_step",
                   "check.paths=[processes]", "check.backends=[gloo]", f"hydra.run.dir={tmp_path}")  # fmt: skip
    assert done.returncode == 1, done.stdout + done.stderr
    report = json.loads((tmp_path / "check.json").read_text())
    assert [p["name"] for p in report["paths"]][:1] == ["step:processes:gloo"] and report["verdict"] == "mismatch"
