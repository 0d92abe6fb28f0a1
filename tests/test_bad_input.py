"""Every kind of bad input: a one-paragraph error that names the key or file, a distinct
exit status, no traceback, and nothing already written lost. (README, "Faults and bad input".)"""

import os
import socket
import textwrap

import pytest
import torch

from conftest import run_cli

QUICK = ("task=teacher", "layout.workers=4", "layout.micro_batch=8", "train.steps=3", "train.progress=false", "train.eval_every=0")

CONFIG, DATA, CHECKPOINT = 2, 3, 4  # exit statuses (scaledrill/errors.py)


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished run whose files must survive every bad call below."""
    run_dir = tmp_path_factory.mktemp("finished") / "run"
    run_cli("run", *QUICK, f"hydra.run.dir={run_dir}", check=True)
    return run_dir


def _snapshot(run_dir):
    return {p.name: p.read_bytes() for p in sorted(run_dir.rglob("*")) if p.is_file() and p.suffix != ".log"}


def _corrupt(tmp_path, finished):
    path = tmp_path / "garbage.pt"
    path.write_bytes(b"\x00not a checkpoint at all" * 10)
    return path


def _truncated(tmp_path, finished):
    data = (finished / "checkpoints" / "step-0000003.pt").read_bytes()
    path = tmp_path / "cut.pt"
    path.write_bytes(data[: len(data) // 2])
    return path


def _foreign(tmp_path, finished):
    path = tmp_path / "foreign.pt"
    torch.save({"weights": torch.zeros(3)}, path)
    return path


def _pickled_code(tmp_path, finished):
    path = tmp_path / "code.pt"
    torch.save({"format": "scaledrill-checkpoint-1", "payload": socket.socket}, path)  # a class: weights_only refuses it
    return path


def _nan_data(tmp_path, finished):
    (tmp_path / "nandata.py").write_text(textwrap.dedent("""
        import torch
        class Set:
            size = 64
            def take(self, index):
                x = torch.ones(len(index), 32)
                x[index == 7] = float("nan")
                return {"input": x, "target": torch.zeros(len(index), 8)}
        class Data:
            def __init__(self):
                self.train = Set()
    """))
    return None


CASES = {
    "workers not a multiple of procs": (("layout.workers=6", "layout.procs=4", "layout.backend=gloo"), CONFIG, "layout.workers"),
    "more processes than the cores can serve": (("layout.workers=512", "layout.procs=512", "layout.backend=gloo"), CONFIG, "layout.procs"),
    "unknown backend": (("layout.backend=tcp",), CONFIG, "layout.backend"),
    "wrong type": (("train.steps=many",), CONFIG, "train.steps"),
    "unknown optimizer": (("optim.name=rmsprop",), CONFIG, "optim"),
    "bad compressor value": (("sync=qsgd", "sync.levels=0"), CONFIG, "sync.levels"),
    "target that does not import": (("task.model._target_=nowhere.Net",), CONFIG, "task.model._target_"),
    "target that fails to build": (("task.model.hidden=-3",), CONFIG, "task.model._target_"),
    "dataset smaller than one global batch": (("task=digits", "layout.workers=64", "layout.micro_batch=32"), DATA, "fewer than one global batch"),
    "NaN in the input data": (("task.data._target_=nandata.Data", "~task.data.in_dim", "~task.data.hidden", "~task.data.out_dim",
                                "~task.data.depth", "~task.data.noise", "~task.data.test_size", "~task.data.seed",
                                "task.model.in_dim=32", "task.model.hidden=8", "task.model.out_dim=8"), DATA, "training sample 7"),
    "occupied port": ("port", CONFIG, "layout.port"),
    "an address that is not a host": (("layout.backend=gloo", "layout.procs=2", "layout.address=not-a-host"), CONFIG, "layout.address"),
    "a step larger than memory": (("layout.micro_batch=100000000",), CONFIG, "layout.micro_batch"),
    "missing mpiexec": (("layout.backend=mpi", "layout.procs=2", "layout.mpiexec=/nonexistent/mpiexec"), CONFIG, "layout.mpiexec"),
    "corrupted checkpoint": (_corrupt, CHECKPOINT, "garbage.pt"),
    "truncated checkpoint": (_truncated, CHECKPOINT, "cut.pt"),
    "foreign checkpoint": (_foreign, CHECKPOINT, "not a scaledrill checkpoint"),
    "checkpoint holding code": (_pickled_code, CHECKPOINT, "code.pt"),
    "checkpoint of another model": ("other-model", CHECKPOINT, "another model"),
    "checkpoint of another layout": ("other-layout", CHECKPOINT, "layout.micro_batch"),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input(tmp_path, finished, name):
    what, status, needle = CASES[name]
    before = _snapshot(finished)
    extra, env = [], {"PYTHONPATH": os.pathsep.join(p for p in (str(tmp_path), os.environ.get("PYTHONPATH")) if p)}
    if name == "NaN in the input data":
        _nan_data(tmp_path, finished)
    if callable(what):
        extra = [f"resume={what(tmp_path, finished)}"]
    elif what == "port":
        holder = socket.socket()
        holder.bind(("127.0.0.1", 0))
        holder.listen()
        extra = ["layout.backend=gloo", "layout.procs=2", f"layout.port={holder.getsockname()[1]}"]
    elif what == "other-model":
        extra = ["task.model.hidden=16", f"resume={finished}"]
    elif what == "other-layout":
        extra = ["layout.micro_batch=4", f"resume={finished}"]
    else:
        extra = list(what)
    done = run_cli("run", *QUICK, *extra, f"hydra.run.dir={tmp_path / 'new'}", env=env)
    assert done.returncode == status, (done.returncode, done.stderr)
    assert needle in done.stderr, done.stderr
    assert "Traceback" not in done.stderr
    assert len([line for line in done.stderr.strip().splitlines() if line.strip()]) <= 3  # one paragraph
    assert _snapshot(finished) == before  # the earlier run is untouched
    assert not (tmp_path / "new" / "summary.json").exists()
