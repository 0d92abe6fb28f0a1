"""Faults: a worker that dies, and an interrupt, end the run cleanly and keep what it wrote."""

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import torch

from conftest import ROOT, run_cli
from procs_util import processes_of, rank_worker

# A run that only a fault ends: at the default rate this layout diverges at step ~170, under a second
# on an idle machine, and a late signal then met a finished run (exit 0) instead of a running one.
LONG = ("task=teacher", "layout.workers=4", "layout.micro_batch=8", "optim.lr=0.03", "train.steps=100000",
        "train.checkpoint_every=5", "train.progress=false", "train.eval_every=0", "telemetry.flush_every=5", "train.timeout_s=20")


def _start(*args: str) -> subprocess.Popen:
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1")
    return subprocess.Popen([sys.executable, "-m", "scaledrill.cli", "run", *args], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)


def _wait_for(path_glob: Path, limit: float = 120.0) -> None:
    deadline = time.monotonic() + limit
    while not list(path_glob.parent.glob(path_glob.name)):
        assert time.monotonic() < deadline, f"nothing matched {path_glob}"
        time.sleep(0.2)


def _children_by_rank(pid: int) -> dict[int, int]:
    out = {}
    for child in subprocess.run(["pgrep", "-P", str(pid)], capture_output=True, text=True).stdout.split():
        environ = Path(f"/proc/{child}/environ").read_bytes().split(b"\0")
        ranks = [e.split(b"=", 1)[1] for e in environ if e.startswith(b"RANK=")]
        if ranks:
            out[int(ranks[0])] = int(child)
    return out


def test_killed_gloo_worker_ends_the_run_and_keeps_its_outputs(tmp_path):
    run_dir = tmp_path / "run"
    proc = _start(*LONG, "layout.backend=gloo", "layout.procs=2", f"hydra.run.dir={run_dir}")
    _wait_for(run_dir / "checkpoints" / "step-0000010.pt")
    os.kill(_children_by_rank(proc.pid)[1], signal.SIGKILL)
    killed = time.monotonic()
    _, err = proc.communicate(timeout=60)
    # bound: the launcher polls every 50 ms and gives the survivors 10 s (grace) before SIGKILL
    assert time.monotonic() - killed < 15
    assert proc.returncode == 5, err  # WorkerFailed
    assert "rank 1 failed" in err and "SIGKILL" in err and "Traceback" not in err
    # the store is readable and the newest checkpoint loads
    with sqlite3.connect(f"file:{run_dir / 'run.sqlite'}?mode=ro", uri=True) as conn:
        assert conn.execute("SELECT COUNT(*) FROM scalars WHERE name = 'loss'").fetchone()[0] >= 10
    newest = sorted((run_dir / "checkpoints").glob("step-*.pt"))[-1]
    state = torch.load(newest, weights_only=True)
    assert state["step"] >= 10
    # and the run resumes from it (on one process: a checkpoint is layout-invariant)
    resumed = tmp_path / "resumed"
    done = run_cli("run", *LONG[:-5], f"train.steps={state['step'] + 3}", "train.progress=false", f"resume={newest}",
                   f"hydra.run.dir={resumed}")
    assert done.returncode == 0, done.stderr


def test_sigint_writes_a_checkpoint_and_resume_equals_the_uninterrupted_run(tmp_path):
    run_dir = tmp_path / "run"
    proc = _start(*LONG, f"hydra.run.dir={run_dir}")
    _wait_for(run_dir / "checkpoints" / "step-0000005.pt")
    os.killpg(proc.pid, signal.SIGINT)  # what Ctrl-C in a terminal does
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "resume=" in err and "Traceback" not in err
    stopped_at = torch.load(sorted((run_dir / "checkpoints").glob("step-*.pt"))[-1], weights_only=True)["step"]
    total = stopped_at + 4
    common = [a for a in LONG if not a.startswith(("train.steps", "train.checkpoint_every"))]
    resumed, straight = tmp_path / "resumed", tmp_path / "straight"
    run_cli("run", *common, f"train.steps={total}", f"resume={run_dir}", f"hydra.run.dir={resumed}", check=True)
    run_cli("run", *common, f"train.steps={total}", f"hydra.run.dir={straight}", check=True)
    a = torch.load(resumed / "checkpoints" / f"step-{total:07d}.pt", weights_only=True)["model"]
    b = torch.load(straight / "checkpoints" / f"step-{total:07d}.pt", weights_only=True)["model"]
    for key in b:
        assert torch.equal(a[key], b[key]), key  # bitwise: same layout, same order of every sum


def test_killed_mpi_rank_ends_the_run(tmp_path):
    run_dir = tmp_path / "run"
    proc = _start(*LONG, "layout.backend=mpi", "layout.procs=2", f"hydra.run.dir={run_dir}")
    _wait_for(run_dir / "checkpoints" / "step-0000010.pt")
    os.kill(rank_worker(run_dir, 1), signal.SIGKILL)  # what the out-of-memory killer does
    _, err = proc.communicate(timeout=30)  # bound: train.timeout_s (20) + 10 s, the README's promise
    assert proc.returncode == 5, err
    assert "rank 1 failed: killed by signal 9 (SIGKILL)" in err and "Traceback" not in err
    assert processes_of(run_dir) == []  # no rank and no mpiexec left
    newest = sorted((run_dir / "checkpoints").glob("step-*.pt"))[-1]
    assert torch.load(newest, weights_only=True)["step"] >= 10
    with sqlite3.connect(f"file:{run_dir / 'run.sqlite'}?mode=ro", uri=True) as conn:
        assert conn.execute("SELECT COUNT(*) FROM scalars WHERE name = 'loss'").fetchone()[0] >= 10
