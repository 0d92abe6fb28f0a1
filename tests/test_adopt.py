"""`scaledrill adopt`: a checkpoint of a plain PyTorch DDP job, resumed and replayed here.

The outside check: tests/plain_ddp_job.py trains with torch alone (2 gloo ranks,
DistributedSampler, SGD with momentum), logs to CSV and saves at step 10; adopt + replay
must reproduce its losses for steps 10-19 (the 11th to 20th) within float rounding.
"""

import csv
import json
import subprocess
import sys

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from conftest import ROOT, make_config, run_cli
from scaledrill.errors import CheckpointError
from scaledrill.optim import build_optimizer
from scaledrill.replay.adopt import adopt
from scaledrill.replay.adopt_optim import adopt_optimizer
from scaledrill.telemetry.store import read_scalars
from tests.fixtures_user import TinyNet

JOB = ["task.name=blobs", "~task.model", "+task.model._target_=tests.fixtures_user.TinyNet", "~task.data",
       "+task.data._target_=tests.fixtures_user.BlobData", "layout.workers=2", "layout.micro_batch=8", "optim.lr=0.05",
       "optim.momentum=0.9", "optim.weight_decay=0.001", "train.order=torch_distributed", "train.steps=20",
       "train.eval_every=0", "train.progress=false"]
# float32 rounding over 10 steps of a two-layer net: the measured gap is 2e-7; 1e-5 is ~170 unit roundoffs
RTOL = 1e-5


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    out = tmp_path_factory.mktemp("cluster")
    # gloo pairs on the loopback device, as our own launcher keeps them; a failure shows the job's
    # stderr (it failed once on CI with nothing to read)
    env = {"OMP_NUM_THREADS": "1", "PATH": "/usr/bin:/bin", "GLOO_SOCKET_IFNAME": "lo"}
    done = subprocess.run([sys.executable, str(ROOT / "tests" / "plain_ddp_job.py"), str(out)], timeout=300,
                          capture_output=True, text=True, env=env)
    if done.returncode:
        pytest.fail(f"the plain DDP job exited {done.returncode}:\n{done.stderr[-4000:]}")
    rows = list(csv.DictReader(open(out / "job.csv")))
    return out, {int(r["step"]): r for r in rows}


def test_adopt_then_replay_reproduces_the_ddp_job(tmp_path, job):
    out, log = job
    adopted = tmp_path / "adopted"
    run_cli("adopt", *JOB, f"adopt.from={out / 'step10.pt'}", "adopt.step=10", "adopt.scheduler_key=scheduler",
            f"adopt.cluster_log={out / 'job.csv'}", f"hydra.run.dir={adopted}", check=True)
    assert (adopted / "checkpoints" / "step-0000010.pt").is_file() and (adopted / "config.yaml").is_file()

    replay = tmp_path / "replay"
    done = run_cli("replay", f"replay.from={adopted}", f"replay.cluster_log={out / 'job.csv'}", f"hydra.run.dir={replay}",
                   check=True)
    result = json.loads((replay / "replay.json").read_text())
    assert result["from_step"] == 10 and result["departure_step"] is None, done.stdout
    scalars = read_scalars(replay / "variant-original" / "run.sqlite")
    steps, loss = scalars["loss"]
    assert steps.tolist() == list(range(10, 20))
    np.testing.assert_allclose(loss, [float(log[s]["loss"]) for s in range(10, 20)], rtol=RTOL)
    np.testing.assert_allclose(scalars["grad_norm"][1], [float(log[s]["grad_norm"]) for s in range(10, 20)], rtol=1e-4)

    # `run resume=` takes the adopted checkpoint too, and continues exactly as the replay did.
    resumed = tmp_path / "resumed"
    run_cli("run", *JOB, f"resume={adopted / 'checkpoints' / 'step-0000010.pt'}", f"hydra.run.dir={resumed}", check=True)
    summary = json.loads((resumed / "summary.json").read_text())
    assert summary["resumed_from_step"] == 10 and summary["final_loss"] == pytest.approx(float(loss[-1]), rel=1e-6)
    # `report` accepts the adopted directory (its steps before 10 come from the cluster log).
    assert run_cli("report", str(adopted)).returncode == 0 and (adopted / "report.html").is_file()


def _adopt(tmp_path, state, *extra):
    path = tmp_path / "foreign.pt"
    torch.save(state, path)
    cfg = make_config(*JOB, f"adopt.from={path}", "adopt.step=3", *extra, name="adopt")
    return adopt(cfg, tmp_path / "run")


def _trained(model, optimizer, steps=2):
    x, y = torch.randn(8, 4), torch.randint(0, 3, (8,))
    for _ in range(steps):
        optimizer.zero_grad()
        torch.nn.functional.cross_entropy(model(x), y).backward()
        optimizer.step()


def test_mismatches_are_named_one_per_line_and_exit_4(tmp_path):
    other = TinyNet(hidden=12)
    state = {k if k != "out.bias" else "head.bias": v for k, v in other.state_dict().items()}
    path = tmp_path / "other.pt"
    torch.save({"model": state}, path)
    done = run_cli("adopt", *JOB, f"adopt.from={path}", "adopt.step=3", f"hydra.run.dir={tmp_path / 'run'}")
    assert done.returncode == 4, done.stderr
    lines = done.stderr.strip().splitlines()
    assert "adopt.model_key: out.bias of task.model is missing from the file" in lines
    assert "adopt.model_key: head.bias in the file is not in task.model" in lines
    assert "adopt.model_key: hidden.weight has shape [12, 4] in the file, [16, 4] in task.model" in lines
    assert "Traceback" not in done.stderr and not (tmp_path / "run" / "checkpoints").exists()


def test_optimizer_type_mismatch_and_python_objects_are_refused(tmp_path):
    model = TinyNet()
    adam = torch.optim.Adam(model.parameters(), lr=0.01)
    _trained(model, adam)
    with pytest.raises(CheckpointError) as err:
        _adopt(tmp_path, {"model": model.state_dict(), "optimizer": adam.state_dict()})
    assert "optimizer type adamw in the file, optim.name=sgd here" in str(err.value)
    with pytest.raises(CheckpointError) as err:
        _adopt(tmp_path, {"model": model.state_dict(), "note": object.__new__(TinyNet)})
    assert "could run code" in str(err.value)


@pytest.mark.parametrize("order", ["named", "no_decay_first", "every_param_its_own_group"])
def test_adam_state_moves_by_name_whatever_the_group_order(order):
    model = TinyNet()
    named = list(model.named_parameters())
    if order == "named":
        groups = [{"params": [p for _, p in named]}]
    elif order == "no_decay_first":
        groups = [{"params": [p for _, p in named if p.ndim <= 1], "weight_decay": 0.0},
                  {"params": [p for _, p in named if p.ndim > 1], "weight_decay": 0.0}]
    else:  # reversed: the named-order assumption does not hold, but each shape fits one parameter only
        groups = [{"params": [p]} for _, p in reversed(named)]
    theirs = torch.optim.Adam(groups, lr=0.01)
    _trained(model, theirs, steps=3)
    by_name = {name: theirs.state[p] for name, p in named}

    ours = build_optimizer(named, OmegaConf.create({"name": "adamw", "lr": 0.01, "betas": [0.9, 0.999], "eps": 1e-8,
                                                   "weight_decay": 0.0, "decay": "coupled"}))
    moved, problems = adopt_optimizer(theirs.state_dict(), ours, model, "adamw", "adopt.optimizer_key")
    assert problems == []
    ours.load_state_dict(moved)
    for group in ours.param_groups:
        for name, p in zip(group["param_names"], group["params"]):
            for key in ("exp_avg", "exp_avg_sq", "step"):
                assert torch.equal(ours.state[p][key], by_name[name][key]), (name, key)


def test_a_parameter_count_mismatch_is_named():
    model = TinyNet()
    theirs = torch.optim.SGD(list(model.parameters())[:3], lr=0.1, momentum=0.9)
    ours = build_optimizer(list(model.named_parameters()), OmegaConf.create({"name": "sgd", "lr": 0.1, "momentum": 0.9}))
    _, problems = adopt_optimizer(theirs.state_dict(), ours, model, "sgd", "adopt.optimizer_key")
    assert problems == ["adopt.optimizer_key: holds 3 parameters in 1 group(s), the model (task.model) has 4 trainable ones"]


def test_a_bare_state_dict_starts_the_optimizer_fresh(tmp_path):
    model = TinyNet()
    record = _adopt(tmp_path, {f"module.{k}": v for k, v in model.state_dict().items()})  # as saved from a DDP wrapper
    assert record["optimizer_state"].startswith("none in the file")
    saved = torch.load(tmp_path / "run" / "checkpoints" / "step-0000003.pt", weights_only=True)
    assert saved["step"] == 3 and all(torch.equal(saved["model"][k], v) for k, v in model.state_dict().items())
    assert saved["optimizer"]["state"] == {}


def test_settings_and_scheduler_that_change_the_step_are_named(tmp_path):
    model = TinyNet()
    sgd = torch.optim.SGD([{"params": [p for p in model.parameters() if p.ndim > 1], "weight_decay": 0.0},
                           {"params": [p for p in model.parameters() if p.ndim <= 1], "weight_decay": 0.0}],
                          lr=0.05, momentum=0.5)
    sched = torch.optim.lr_scheduler.StepLR(sgd, step_size=1, gamma=0.5)
    _trained(model, sgd)
    sched.step()
    with pytest.raises(CheckpointError) as err:
        _adopt(tmp_path, {"model": model.state_dict(), "optimizer": sgd.state_dict(), "scheduler": sched.state_dict()},
               "adopt.scheduler_key=scheduler")
    lines = str(err.value).splitlines()[1:]
    # momentum 0.5 in the file, 0.9 in JOB: named per parameter; the weights lack JOB's weight decay 1e-3
    assert "adopt.optimizer_key: parameter hidden.weight: momentum is 0.5 in the file, 0.9 here (optim.momentum)" in lines
    assert ("adopt.optimizer_key: parameter out.weight: weight_decay is 0.0 in the file, 0.001 here "
            "(optim.weight_decay / optim.exclude)") in lines
    assert "adopt.scheduler_key: the saved scheduler's rate for step 3 is 0.025, the schedule, scaling and optim keys give 0.05" in lines
    assert len([x for x in lines if "momentum" in x]) == 4  # one line per parameter


def test_groups_whose_shapes_fit_two_splits_are_refused():
    class Two(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b = torch.nn.Parameter(torch.ones(3)), torch.nn.Parameter(torch.ones(3))

    model = Two()
    theirs = torch.optim.SGD([{"params": [model.b]}, {"params": [model.a]}], lr=0.1, momentum=0.9)  # not in named order
    model.a.grad, model.b.grad = torch.full((3,), 1.0), torch.full((3,), 2.0)
    theirs.step()
    ours = build_optimizer(list(model.named_parameters()), OmegaConf.create({"name": "sgd", "lr": 0.1, "momentum": 0.9}))
    _, problems = adopt_optimizer(theirs.state_dict(), ours, model, "sgd", "adopt.optimizer_key")
    assert len(problems) == 1 and "fit several splits" in problems[0]
