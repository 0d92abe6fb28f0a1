"""Ordinary torch datasets and losses as tasks (tasks/adapters.py), and the worked user project in examples/."""

import json
import os
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
from torch.utils.data import Dataset, Subset, TensorDataset, default_collate, random_split

from conftest import make_config, run_cli
from scaledrill.errors import ConfigError
from scaledrill.tasks.adapters import MapData, TorchData, TorchLoss
from scaledrill.tasks.base import build_task

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "own_project"


class DictSet(Dataset):
    def __len__(self):
        return 10

    def __getitem__(self, i):
        return {"input": torch.full((3,), float(i)), "target": i % 2}


def test_tuple_and_dict_samples_and_a_collate():
    x, y = torch.randn(10, 4), torch.arange(10)
    batch = MapData(TensorDataset(x, y)).take(torch.tensor([7, 2]))
    assert torch.equal(batch["input"], x[[7, 2]]) and torch.equal(batch["target"], y[[7, 2]])
    batch = MapData(DictSet()).take(torch.tensor([3, 4]))
    assert batch["input"][:, 0].tolist() == [3.0, 4.0] and batch["target"].tolist() == [1, 0]
    pad = lambda samples: {"input": torch.stack([s["input"] for s in samples]) * 2}  # noqa: E731
    assert MapData(DictSet(), collate=pad).take(torch.tensor([5]))["input"][0, 0] == 10.0
    assert TorchData(DictSet(), DictSet()).test.size == 10


def _collated(dataset, index, keys=("input", "target")):
    """What the per-sample route gives: each sample fetched, then torch's default_collate."""
    parts = default_collate([dataset[i] for i in index.tolist()])
    return dict(zip(keys, parts))


class Doubled(TensorDataset):
    """A subclass that changes its samples: must not take the TensorDataset shortcut."""

    def __getitem__(self, i):
        x, y = super().__getitem__(i)
        return x * 2, y


class Batched(DictSet):
    """A dataset with torch's batched fetch: asked once per batch."""

    def __init__(self):
        self.calls = 0

    def __getitems__(self, indices):
        self.calls += 1
        return [self[i] for i in indices]


def test_tensor_datasets_and_their_subsets_gather_what_the_collate_gives():
    torch.manual_seed(3)
    x, y, w = torch.randn(40, 3, 2), torch.randint(5, (40,)), torch.rand(40, dtype=torch.float64)
    base = TensorDataset(x, y, w)
    first, _ = random_split(base, [30, 10], generator=torch.Generator().manual_seed(0))
    nested = Subset(first, [4, 0, 29, 7, 7])
    index = torch.tensor([3, 1, 4, 1, 0])
    keys = ("input", "target", "weight")
    for dataset in (base, first, nested, TensorDataset(x)):
        data = MapData(dataset, keys=keys)
        assert data.tensors is not None
        got, want = data.take(index), _collated(dataset, index, keys)
        assert got.keys() == want.keys()
        for k in want:
            assert got[k].dtype == want[k].dtype and torch.equal(got[k], want[k]), k
    doubled = MapData(Doubled(x, y))
    assert doubled.tensors is None and torch.equal(doubled.take(index)["input"], x[index] * 2)
    batched = Batched()
    got = MapData(batched).take(torch.tensor([2, 5, 8]))
    assert batched.calls == 1 and got["input"][:, 0].tolist() == [2.0, 5.0, 8.0] and got["target"].tolist() == [0, 1, 0]
    with pytest.raises(ValueError, match="3 parts but only the keys"):
        MapData(base).take(index)


@pytest.mark.parametrize("fn", [torch.nn.CrossEntropyLoss(), F.cross_entropy])
def test_a_mean_reduced_classification_loss_becomes_a_sum_over_samples(fn):
    torch.manual_seed(0)
    out, target = torch.randn(12, 5), torch.randint(5, (12,))
    loss, batch = TorchLoss(fn), {"target": target}
    # the engine divides the SUM by the units of the whole global batch: that is torch's mean
    assert loss(out, batch) / loss.count(batch) == pytest.approx(F.cross_entropy(out, target).item(), rel=1e-6)
    halves = [{"target": target[:5]}, {"target": target[5:]}]
    total = loss(out[:5], halves[0]) + loss(out[5:], halves[1])
    assert total / 12 == pytest.approx(F.cross_entropy(out, target).item(), rel=1e-6)


def test_mse_averages_over_outputs_like_its_mean():
    out, target = torch.randn(6, 4), torch.randn(6, 4)
    loss, batch = TorchLoss(torch.nn.MSELoss()), {"target": target}
    assert loss(out, batch) / loss.count(batch) == pytest.approx(F.mse_loss(out, target).item(), rel=1e-6)


def test_token_loss_skips_padding_and_weights_tokens_not_sequences():
    torch.manual_seed(1)
    out, target = torch.randn(4, 6, 7), torch.randint(1, 7, (4, 6))
    target[0, 2:] = 0  # padding, id 0
    target[3, 5:] = 0
    loss = TorchLoss(torch.nn.CrossEntropyLoss(ignore_index=0), tokens=True)
    whole = F.cross_entropy(out.flatten(0, 1), target.flatten(), ignore_index=0)  # torch: mean over valid tokens
    parts = [(out[:1], {"target": target[:1]}), (out[1:], {"target": target[1:]})]  # 2 tokens vs 17
    total = sum(loss(o, b) for o, b in parts) / sum(loss.count(b) for _, b in parts)
    assert loss.count({"target": target}) == 19 and total == pytest.approx(whole.item(), rel=1e-6)
    accuracy = loss.metrics(out, {"target": target})["accuracy"]
    assert accuracy == ((out.argmax(-1) == target) & (target != 0)).sum()


def test_custom_task_with_plain_torch_parts_builds():
    node = make_config("task=custom", "task.model._target_=torch.nn.Linear", "+task.model.in_features=4",
                       "+task.model.out_features=2", "task.data._target_=test_adapters.DictSet").task  # fmt: skip
    task = build_task(node)
    assert task.data.train.size == 10 and isinstance(task.loss, TorchLoss) and not task.loss.per_token


def test_custom_task_without_a_model_names_the_key():
    with pytest.raises(ConfigError) as err:
        build_task(make_config("task=custom").task)
    assert err.value.key == "task.model._target_"


def _example_env():
    return {"PYTHONPATH": os.pathsep.join([str(EXAMPLE), os.environ.get("PYTHONPATH", "")])}


def test_the_example_project_trains_from_its_own_config_dir(tmp_path):
    done = run_cli("run", "--config-dir", str(EXAMPLE / "configs"), "+preset=rings_large", "train.progress=false",
                   f"hydra.run.dir={tmp_path}", env=_example_env(), check=True)  # fmt: skip
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["steps"] == 60 and "B=512" in done.stdout
    # three rings at radii 1, 2, 3 with noise 0.1 are separable: a trained classifier is near-perfect
    assert summary["eval"]["accuracy"] > 0.9


def test_the_example_task_matches_the_plain_torch_reference(tmp_path):
    # `check` compares the workers' gradients with one float64 autograd pass over the whole batch
    done = run_cli("check", "--config-dir", str(EXAMPLE / "configs"), "task=rings", "layout.workers=4",
                   "layout.accum=2", "layout.micro_batch=8", f"hydra.run.dir={tmp_path}", env=_example_env())
    assert done.returncode == 0, done.stdout + done.stderr
