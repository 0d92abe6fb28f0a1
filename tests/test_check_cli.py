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
