"""`ladder.parallel`: rungs trained at once in a pool of spawned processes, against the same rungs one by one."""

import json
from concurrent.futures import Future
from concurrent.futures.process import BrokenProcessPool

import pytest
import torch

from conftest import make_config
from scaledrill.commands.ladder import ladder_verb
from scaledrill.errors import ConfigError
from scaledrill.ladder.climb import _collected
from scaledrill.ladder.rungs import plan_ladder
from scaledrill.telemetry.store import read_scalars

QUAD = (
    "task=quadratic", "task.data.dim=16", "optim.momentum=0", "layout.micro_batch=2", "layout.workers=2",
    "telemetry.layer_every=0", "train.progress=false", "train.eval_every=0", "ladder.batches=[4,8,16]",
    "optim.lr=0.2", "scaling=linear", "scaling.base_batch=4", "ladder.max_steps=400", "ladder.check_every=2",
    "ladder.goal.value=0.05",
)
PER_RUN = ("wall_seconds", "run_dir", "error")  # fields of a rung's record that name the run's folder or time


def quad_ladder(parallel: int):
    return make_config(*QUAD, f"ladder.parallel={parallel}", name="ladder")


def without(record: dict, keys=PER_RUN) -> dict:
    return {k: v for k, v in record.items() if k not in keys}


def blocked_ladder(tmp_path, name: str, parallel: int):
    """The ladder with the folder of rung B=8 taken by a file, so that rung fails when it starts."""
    (tmp_path / name).mkdir()
    (tmp_path / name / "rung-B0008").write_text("not a folder\n")
    return ladder_verb(quad_ladder(parallel), tmp_path / name)


def test_parallel_rungs_give_the_serial_numbers_and_a_failing_rung_loses_nothing(tmp_path):
    # a pool worker trains on one torch thread; so does the serial run here, or sums could differ in the last bit
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        serial = blocked_ladder(tmp_path, "serial", 1)
    finally:
        torch.set_num_threads(threads)
    parallel = blocked_ladder(tmp_path, "parallel", 2)

    saved = json.loads((tmp_path / "parallel" / "ladder.json").read_text())
    assert saved == json.loads(json.dumps(parallel.payload))
    assert serial.exit_code == parallel.exit_code == 1  # a rung failed
    rungs = saved["rungs"]
    assert [r["global_batch"] for r in rungs] == [4, 8, 16]  # by batch, whatever order the pool finished in
    # same seeds, same single-threaded float32 arithmetic: every number is identical, not merely close
    assert [without(r) for r in rungs] == [without(r) for r in serial.payload["rungs"]]
    assert saved["fit"] == serial.payload["fit"] and saved["fit"]["e_min"] > 0

    failed = rungs[1]
    assert failed["error"].startswith("FileExistsError") and "rung-B0008" in failed["error"]
    assert failed["steps_to_target"] is None and failed["regime"] is None and failed["lr"] == pytest.approx(0.4)
    for r in (rungs[0], rungs[2]):
        assert not r.get("error") and r["final_metric"] <= 0.05 and r["steps_to_target"] % 2 == 0
        assert r["samples_to_target"] == r["steps_to_target"] * r["global_batch"]
        folders = [tmp_path / w / f"rung-B{r['global_batch']:04d}" for w in ("serial", "parallel")]
        assert r["run_dir"] == str(folders[1]) and all((f / "config.yaml").exists() for f in folders)
        one, other = (json.loads((f / "summary.json").read_text()) for f in folders)
        assert one["params_digest"] == other["params_digest"]
        assert one["steps"] == other["steps"] == r["steps_to_target"] and other["stopped_early"]
        losses = [read_scalars(f / "run.sqlite")["loss"][1].tolist() for f in folders]
        assert losses[0] == losses[1] and len(losses[1]) == r["steps_to_target"]
    assert rungs[0]["steps_to_target"] > rungs[2]["steps_to_target"]  # four times the batch, fewer steps


def test_a_pool_job_that_died_is_recorded_against_its_rung(tmp_path):
    cfg = quad_ladder(2)
    plan = plan_ladder(cfg)
    job = Future()
    job.set_exception(BrokenProcessPool("a process in the pool was terminated abruptly"))
    record, search = _collected(job, cfg, plan.rungs[1], tmp_path)
    assert search is None and record["global_batch"] == 8 and record["workers"] == 4
    assert record["error"].startswith("BrokenProcessPool: ") and record["steps_to_target"] is None
    assert record["run_dir"] == str(tmp_path / "rung-B0008")

    stopped = Future()
    stopped.set_exception(ConfigError("ladder.goal.metric", "the task quadratic reports loss", "acc"))
    with pytest.raises(ConfigError):  # bad configuration still stops the whole ladder
        _collected(stopped, cfg, plan.rungs[0], tmp_path)
