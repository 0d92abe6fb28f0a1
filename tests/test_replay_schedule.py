"""`scaledrill replay` keeps the original schedule when the replay runs shorter or longer,
and replays runs made with a config directory of the user's own."""

import json
import math

import pytest

from conftest import make_config, run_cli
from scaledrill.commands.replay import replay_verb
from scaledrill.telemetry.store import read_scalars
from scaledrill.train.run import run_verb

COSINE = ["task=teacher", "layout.workers=4", "layout.micro_batch=8", "train.steps=20", "train.checkpoint_every=5",
          "train.eval_every=0", "train.progress=false", "optim.lr=0.05", "schedule=cosine"]


def cosine_lr(step: int, total: int, peak: float = 0.05) -> float:
    # schedules.py, no warmup: peak · ½(1 + cos(π·s/total)) (Loshchilov & Hutter 2017)
    return peak * 0.5 * (1 + math.cos(math.pi * step / total))


@pytest.fixture(scope="module")
def cosine_run(tmp_path_factory):
    run_dir = tmp_path_factory.mktemp("cos") / "run"
    run_verb(make_config(*COSINE), run_dir)
    return run_dir


@pytest.mark.parametrize("steps", [12, 30])
def test_a_shorter_or_longer_replay_keeps_the_original_cosine(tmp_path, cosine_run, steps):
    cfg = make_config(f"replay.from={cosine_run / 'checkpoints' / 'step-0000005.pt'}", f"replay.steps={steps}",
                      '+replay.variants.recosine=["schedule.final_factor=0.0"]', name="replay")  # fmt: skip
    replay_verb(cfg, tmp_path / "replay")
    original = read_scalars(tmp_path / "replay" / "variant-original" / "run.sqlite")["lr"]
    ran = read_scalars(cosine_run / "run.sqlite")["lr"]
    for step, lr in zip(*original):
        assert lr == pytest.approx(cosine_lr(min(step, 20), 20), rel=1e-6)  # the 20-step cosine, not a new one
        if step < 20:
            assert lr == pytest.approx(float(ran[1][list(ran[0]).index(step)]), rel=1e-12)
    # a variant that sets a schedule key changes the schedule on purpose: it spans the replay's own length
    changed = read_scalars(tmp_path / "replay" / "variant-recosine" / "run.sqlite")["lr"]
    assert changed[1][-1] == pytest.approx(cosine_lr(steps - 1, steps), rel=1e-6)


MINE = """
name: mine
model:                 # the digits model without its group_size key: no shipped task file matches this one
  _target_: scaledrill.tasks.digits.DigitsNet
  width: 4
data:
  _target_: scaledrill.tasks.digits.DigitsData
  test_fraction: 0.2
  split_seed: 0
loss:
  _target_: scaledrill.tasks.losses.CrossEntropySum
"""


def test_a_run_with_a_user_config_dir_replays(tmp_path):
    (tmp_path / "configs" / "task").mkdir(parents=True)
    (tmp_path / "configs" / "task" / "mine.yaml").write_text(MINE)
    run_cli("run", "--config-dir", str(tmp_path / "configs"), "task=mine", "layout.workers=4", "train.steps=8",
            "train.checkpoint_every=4", "train.eval_every=0", "train.progress=false", f"hydra.run.dir={tmp_path / 'run'}",
            check=True)  # fmt: skip
    done = run_cli("replay", f"replay.from={tmp_path / 'run' / 'checkpoints' / 'step-0000004.pt'}",
                   '+replay.variants.slow=["optim.lr=0.01"]', f"hydra.run.dir={tmp_path / 'replay'}")  # fmt: skip
    assert done.returncode == 0, done.stdout + done.stderr
    doc = json.loads((tmp_path / "replay" / "replay.json").read_text())
    straight = json.loads((tmp_path / "run" / "summary.json").read_text())
    original = next(v for v in doc["variants"] if v["name"] == "original")
    assert original["final_loss"] == straight["final_loss"]  # the continuation is the run itself, bit for bit
    assert next(v for v in doc["variants"] if v["name"] == "slow")["final_loss"] != straight["final_loss"]
