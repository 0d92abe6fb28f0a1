"""Ordinary torch datasets and losses as scaledrill tasks, with no code of one's own.

Why: the task protocol (tasks/__init__.py) asks for `take(index)` on datasets and
for losses that return a SUM over units and say how many units there are. Both
follow from what torch users already have:

- `MapData` / `TorchData`: any map-style `torch.utils.data.Dataset` (`__getitem__`
  and `__len__`). `take(index)` gathers the samples at those indices and collates
  them (`torch.utils.data.default_collate`, or the `collate` given). Samples that
  are tuples or lists become {"input": first, "target": second, ...} (names in
  `keys`); dict samples keep their keys and need an "input". The dataset must
  return the same sample for the same index (no random augmentation drawn from
  a global generator), since every worker and layout must see the same data.
  A `TensorDataset`, or a `Subset` of one (what `random_split` returns), is
  gathered with one `index_select` per tensor instead of a Python call per
  sample (~2.4 ms for 512 samples otherwise, twice a small MLP's whole step on
  CPU); a dataset with `__getitems__` (the batched fetch torch's DataLoader
  uses) is asked once per batch. Either gives what the collate would.
- `TorchLoss`: any torch loss module (`torch.nn.CrossEntropyLoss()`) or function
  (`torch.nn.functional.mse_loss`). It is called with `reduction="none"` and the
  per-element losses become per-unit losses by averaging over everything but the
  sample dimension — exactly what the loss's default `mean` reduction averages —
  then summed; the engine divides by the units of the whole global batch, so the
  result equals the loss torch would compute on the whole batch at once.
  `tokens=True` is for sequence models: logits [N, T, V], targets [N, T], the
  unit is a target token that is not `ignore_index` (padding), as in
  `cross_entropy(..., ignore_index=...)` with mean reduction over the batch.

build_task (base.py) wraps a plain dataset or a plain torch loss in these
automatically, so `task.data._target_=mypkg.MyDataset` and
`task.loss._target_=torch.nn.MSELoss` work as they are.
"""

import copy

import torch
from torch.utils.data import Subset, TensorDataset, default_collate


class MapData:
    """A map-style torch Dataset with `size` and `take(index)`."""

    def __init__(self, dataset, keys=("input", "target"), collate=None):
        if not (hasattr(dataset, "__getitem__") and hasattr(dataset, "__len__")):
            raise TypeError(f"{type(dataset).__name__} is not a map-style dataset (needs __getitem__ and __len__)")
        self.dataset, self.keys, self.collate = dataset, tuple(keys), collate or default_collate
        self.size = len(dataset)
        self.tensors = _tensors_of(dataset) if collate is None else None

    def take(self, index: torch.Tensor) -> dict[str, torch.Tensor]:
        if self.tensors is not None:
            return self._gather(index)
        if hasattr(self.dataset, "__getitems__"):
            samples = self.dataset.__getitems__(index.tolist())
        else:
            samples = [self.dataset[i] for i in index.tolist()]
        batch = self.collate(samples)
        if isinstance(batch, (tuple, list)):
            if len(batch) > len(self.keys):
                raise ValueError(f"samples have {len(batch)} parts but only the keys {list(self.keys)} name them")
            batch = dict(zip(self.keys, batch))
        elif isinstance(batch, torch.Tensor):
            batch = {"input": batch}  # unlabelled samples
        if not isinstance(batch, dict) or "input" not in batch:
            raise ValueError("collated samples must be a tuple (input, target, ...) or a dict with an 'input' key")
        return {k: torch.as_tensor(v) for k, v in batch.items()}

    def _gather(self, index: torch.Tensor) -> dict[str, torch.Tensor]:
        """The collated batch of a TensorDataset (or a Subset of one), by index_select."""
        tensors, rows = self.tensors
        index = index.reshape(-1) if rows is None else rows.index_select(0, index.reshape(-1))
        if len(tensors) > len(self.keys):
            raise ValueError(f"samples have {len(tensors)} parts but only the keys {list(self.keys)} name them")
        return {k: t.index_select(0, index) for k, t in zip(self.keys, tensors)}


def _tensors_of(dataset) -> tuple[list[torch.Tensor], torch.Tensor | None] | None:
    """(tensors, rows) when `dataset` is a TensorDataset or a chain of Subsets of one:
    sample i is (t[rows[i]] for t in tensors), rows None for every row in order."""
    if type(dataset) is TensorDataset:  # exactly: a subclass may override __getitem__
        return list(dataset.tensors), None
    if type(dataset) is Subset:
        inner = _tensors_of(dataset.dataset)
        if inner is not None:
            tensors, rows = inner
            picked = torch.as_tensor(dataset.indices, dtype=torch.long)
            return tensors, picked if rows is None else rows.index_select(0, picked)
    return None


class TorchData:
    """The task's data from torch Datasets: `train`, and `test` when given (evaluated with the loss's metrics)."""

    def __init__(self, train, test=None, keys=("input", "target"), collate=None):
        self.train = MapData(train, keys, collate)
        if test is not None:
            self.test = MapData(test, keys, collate)


class TorchLoss:
    """A torch loss module or function as a scaledrill Loss (module doc)."""

    def __init__(self, fn, tokens: bool = False, ignore_index: int | None = None, target_key: str = "target"):
        if not callable(fn):
            raise TypeError(f"the loss must be a torch loss module or function, got {type(fn).__name__}")
        if isinstance(fn, torch.nn.Module) and hasattr(fn, "reduction"):
            fn = copy.copy(fn)
            fn.reduction = "none"
            self._call = fn
        else:
            self._call = lambda output, target: fn(output, target, reduction="none")
        self.per_token = bool(tokens)
        self.ignore_index = ignore_index if ignore_index is not None else getattr(fn, "ignore_index", -100)
        self.target_key = target_key

    def _losses(self, output, target):
        if self.per_token:  # [N, T, V] and [N, T]: one row per token; ignored tokens give 0
            return self._call(output.flatten(0, -2), target.flatten())
        losses = self._call(output, target)
        return losses.reshape(target.shape[0], -1).mean(1)  # what `mean` averages, per sample

    def __call__(self, output, batch):
        return self._losses(output, batch[self.target_key]).sum()

    def _valid(self, target):
        return target != self.ignore_index

    def count(self, batch):
        target = batch[self.target_key]
        if self.per_token:
            return self._valid(target).sum().to(torch.get_default_dtype())
        return torch.tensor(float(target.shape[0]))

    def metrics(self, output, batch):
        target = batch[self.target_key]
        out = {"loss": self(output, batch)}
        if not target.is_floating_point() and output.shape[:-1] == target.shape:  # class scores: accuracy too
            hits = output.argmax(-1) == target
            if self.per_token:
                hits = hits & self._valid(target)
            out["accuracy"] = hits.sum().to(output.dtype)
        return out
