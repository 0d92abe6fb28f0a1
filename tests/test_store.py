import math
import signal
import sqlite3
import subprocess
import sys
import textwrap
from contextlib import closing

import numpy as np
import pytest

from scaledrill.telemetry.store import RunStore, open_store, read_events, read_layers, read_runs, read_scalars

CHILD = textwrap.dedent(
    """
    import sys, time
    from scaledrill.telemetry.store import RunStore
    store = RunStore(sys.argv[1], flush_every=10)
    store.start("run", "layout:\\n  workers: 8\\n")
    layers = {f"l{j}": {"weight_norm": 1.0, "grad_norm": 2.0, "update_norm": 3.0, "update_ratio": 3.0} for j in range(3)}
    for step in range(23):  # two log calls per step: a commit every 5 steps
        store.log_scalars(step, {"loss": 1.0 / (step + 1), "grad_norm": 0.5})
        store.log_layers(step, layers)
    print(store.commits, flush=True)
    time.sleep(60)
    """
)


def test_sigkill_keeps_every_committed_batch(tmp_path):
    db = tmp_path / "run.sqlite"
    with subprocess.Popen([sys.executable, "-c", CHILD, str(db)], stdout=subprocess.PIPE, text=True) as child:
        try:
            commits = int(child.stdout.readline())  # the child has logged 23 steps and is sleeping
            child.send_signal(signal.SIGKILL)
            child.wait(timeout=10)
        finally:
            child.kill()
    assert child.returncode == -signal.SIGKILL
    assert commits == 4  # steps 0-4, 5-9, 10-14, 15-19; steps 20-22 still buffered
    assert (tmp_path / "run.sqlite-wal").exists()  # the data lives in the WAL the killed writer left
    scalars = read_scalars(db)
    assert sorted(scalars) == ["grad_norm", "loss"]
    steps, loss = scalars["loss"]
    np.testing.assert_array_equal(steps, np.arange(20))
    np.testing.assert_allclose(loss, 1.0 / (np.arange(20) + 1), rtol=0)
    lsteps, names, matrix = read_layers(db, "update_ratio")
    assert names == ["l0", "l1", "l2"] and matrix.shape == (20, 3) and (matrix == 3.0).all()
    with closing(open_store(db)) as conn:
        assert conn.execute("SELECT COUNT(*) FROM layers").fetchone()[0] == 20 * 3 * 4
    (run,) = read_runs(db)
    assert run["status"] == "running" and run["kind"] == "run" and "workers: 8" in run["config_yaml"]


def test_round_trip_and_nonfinite_values(tmp_path):
    db = tmp_path / "run.sqlite"
    store = RunStore(db, flush_every=3)
    rid = store.start("ladder", "a: 1\n")
    store.log_scalars(0, {"loss": 2.0})
    store.log_scalars(1, {"loss": math.inf})
    store.log_scalars(2, {"loss": math.nan})  # SQLite keeps NaN as NULL; the reader gives NaN back
    store.log_layers(0, {"fc1.weight": {"update_ratio": 0.1}, "fc2.weight": {"update_ratio": 0.2}})
    store.log_layers(10, {"fc2.weight": {"update_ratio": 0.4}})
    store.log_event(2, "detector", {"reason": "loss is nan at step 2"})
    store.close("diverged")
    steps, loss = read_scalars(db, run_id=rid)["loss"]
    assert steps.tolist() == [0, 1, 2] and loss[0] == 2.0 and loss[1] == math.inf and math.isnan(loss[2])
    steps, names, m = read_layers(db, "update_ratio")
    assert steps.tolist() == [0, 10] and names == ["fc1.weight", "fc2.weight"]
    assert m[0].tolist() == [0.1, 0.2] and math.isnan(m[1, 0]) and m[1, 1] == 0.4
    assert read_events(db) == [{"step": 2, "kind": "detector", "detail": {"reason": "loss is nan at step 2"}}]
    assert read_runs(db)[0]["status"] == "diverged"


def test_reader_sees_commits_while_the_writer_runs_and_cannot_write(tmp_path):
    db = tmp_path / "run.sqlite"
    store = RunStore(db, flush_every=2)
    first = store.start("run", "")
    store.log_scalars(0, {"loss": 1.0})
    assert read_scalars(db) == {}  # buffered, not committed
    store.log_scalars(1, {"loss": 0.9})
    assert read_scalars(db)["loss"][0].tolist() == [0, 1]
    with pytest.raises(sqlite3.OperationalError, match="readonly"):
        with closing(open_store(db)) as conn:
            conn.execute("DELETE FROM scalars")
    store.close()
    again = RunStore(db)  # a second run in the same file: readers default to the latest
    second = again.start("run", "")
    again.log_scalars(0, {"loss": 5.0})
    again.close()
    assert read_scalars(db)["loss"][1].tolist() == [5.0]
    assert read_scalars(db, run_id=first)["loss"][1].tolist() == [1.0, 0.9]
    assert [r["id"] for r in read_runs(db)] == [first, second]


def test_missing_file_and_logging_before_start(tmp_path):
    with pytest.raises(FileNotFoundError):
        read_runs(tmp_path / "nope.sqlite")
    assert not (tmp_path / "nope.sqlite").exists()
    store = RunStore(tmp_path / "run.sqlite")
    with pytest.raises(RuntimeError):
        store.log_scalars(0, {"loss": 1.0})
    store.close()
