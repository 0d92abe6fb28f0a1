"""The built wheel runs where a user installs it: outside the checkout, not editable.

The wheel is built from a copy of the sources (the checkout stays clean) and
installed with --no-deps into a fresh virtual environment in a temporary folder.
The dependencies (torch, hydra, ...) come from this interpreter's site-packages
through a plain path line in a .pth file: such a line adds the folder to sys.path,
but the .pth files inside it (the editable install's finder among them) are not
read, so scaledrill can only come from the wheel. Every command runs with the
temporary folder as working directory and no PYTHONPATH into the checkout.
"""

import json
import os
import shutil
import site
import subprocess
import sys
import textwrap
import venv
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGED_CONF = sorted(p.relative_to(ROOT / "src").as_posix() for p in (ROOT / "src" / "scaledrill" / "conf").rglob("*.yaml"))

pytestmark = pytest.mark.slow

# The user's own project: a model and a data set in their module, a task and a preset in their config folder.
USER_MODULE = '''
import numpy as np
import torch
from torch import nn


class Rows:
    def __init__(self, x, y):
        self.x, self.y, self.size = x, y, len(x)

    def take(self, index):
        return {"input": self.x[index], "target": self.y[index]}


class PointsCsv:
    """Rows of a CSV file: the first columns are the input, the last one the target."""

    def __init__(self, path):
        table = torch.from_numpy(np.loadtxt(path, delimiter=",", ndmin=2))
        self.train = Rows(table[:, :-1].float(), table[:, -1:].float())


class TinyNet(nn.Module):
    def __init__(self, inputs, hidden):
        super().__init__()
        self.body = nn.Sequential(nn.Linear(inputs, hidden), nn.Tanh(), nn.Linear(hidden, 1))

    def forward(self, x):
        return self.body(x)
'''


def _run(args, cwd, env, timeout=300):
    done = subprocess.run(args, check=False, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)
    assert done.returncode == 0, f"{' '.join(map(str, args))} exited {done.returncode}\n{done.stdout}\n{done.stderr}"
    return done


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """(the new environment's bin folder, a clean environment for subprocesses)."""
    top = tmp_path_factory.mktemp("wheel")
    source = top / "source"
    source.mkdir()
    shutil.copy(ROOT / "pyproject.toml", source)
    shutil.copy(ROOT / "README.md", source)
    shutil.copytree(ROOT / "src", source / "src", ignore=shutil.ignore_patterns("__pycache__", "*.egg-info"))
    wheels = top / "wheels"
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env["OMP_NUM_THREADS"] = "1"
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q", "-w", wheels, "."], source, env)
    (wheel,) = wheels.glob("scaledrill-*.whl")

    names = zipfile.ZipFile(wheel).namelist()
    assert sorted(n for n in names if n.startswith("scaledrill/conf/")) == PACKAGED_CONF  # nested groups too

    target = top / "venv"
    venv.create(target, with_pip=False, system_site_packages=False)
    python = target / "bin" / "python"
    _run([sys.executable, "-m", "pip", "--python", python, "install", "--no-deps", "--no-index", "-q", wheel], top, env)
    new_site = Path(_run([python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], top, env).stdout.strip())
    (new_site / "_dependencies.pth").write_text("\n".join(site.getsitepackages()) + "\n")
    return target / "bin", env


def test_the_wheel_imports_from_its_own_environment(installed, tmp_path):
    bin_dir, env = installed
    where = _run([bin_dir / "python", "-c", "import scaledrill; print(scaledrill.__file__)"], tmp_path, env).stdout.strip()
    assert Path(where).resolve().is_relative_to(bin_dir.parent.resolve()), where


def test_run_and_check_from_the_installed_command(installed, tmp_path):
    bin_dir, env = installed
    _run([bin_dir / "scaledrill", "run", "train.steps=2", "train.progress=false", "train.eval_every=0",
          "hydra.run.dir=out/run"], tmp_path, env)  # fmt: skip
    summary = json.loads((tmp_path / "out" / "run" / "summary.json").read_text())
    assert summary["steps"] == 2 and (tmp_path / "out" / "run" / "config.yaml").is_file()

    _run([bin_dir / "scaledrill", "check", "layout.workers=4", "check.paths=[accumulation,fused]", "check.steps=1",
          "hydra.run.dir=out/check"], tmp_path, env)  # fmt: skip
    check = json.loads((tmp_path / "out" / "check" / "check.json").read_text())
    assert check["verdict"] == "match" and {p["name"] for p in check["paths"]} == {"accumulation", "workers:fused"}


def test_a_user_config_folder_brings_its_own_task_and_preset(installed, tmp_path):
    """The README's flow: `--config-dir` adds the user's folder to the places Hydra looks for config groups."""
    bin_dir, env = installed
    project = tmp_path / "myproject"
    (project / "conf" / "task").mkdir(parents=True)
    (project / "conf" / "mine").mkdir()
    (project / "mylab.py").write_text(USER_MODULE)
    rows = [(i / 64, (i % 7) / 7, 0.5 * i / 64 - (i % 7) / 7) for i in range(64)]
    (project / "points.csv").write_text("".join(f"{a},{b},{y}\n" for a, b, y in rows))
    (project / "conf" / "task" / "mytask.yaml").write_text(
        textwrap.dedent(f"""\
        name: mytask
        model:
          _target_: mylab.TinyNet
          inputs: 2
          hidden: 8
        data:
          _target_: mylab.PointsCsv
          path: {project / "points.csv"}
        loss:
          _target_: scaledrill.tasks.losses.MSESum
        """)
    )
    (project / "conf" / "mine" / "quick.yaml").write_text(
        textwrap.dedent("""\
        # @package _global_
        layout:
          workers: 4
          micro_batch: 4
          accum: 2
        train:
          steps: 3
          eval_every: 0
          progress: false
        """)
    )
    env = dict(env, PYTHONPATH=str(project))
    _run([bin_dir / "scaledrill", "run", "--config-dir", project / "conf", "task=mytask", "+mine=quick",
          "optim.lr=0.05", "hydra.run.dir=out/mine"], tmp_path, env)  # fmt: skip
    summary = json.loads((tmp_path / "out" / "mine" / "summary.json").read_text())
    assert summary["steps"] == 3 and summary["global_batch"] == 4 * 4 * 2  # B = W·b·k of the user's preset
    saved = (tmp_path / "out" / "mine" / "config.yaml").read_text()
    assert "mylab.TinyNet" in saved and "points.csv" in saved
