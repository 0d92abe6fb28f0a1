"""The handwritten digits task: scikit-learn's bundled copy of the UCI set.

`sklearn.datasets.load_digits` ships the 1797 8x8 images of the UCI "Optical
Recognition of Handwritten Digits" set (pixel values 0..16) with the package, so
nothing is downloaded. Images become float32 [1, 8, 8] scaled by 1/16. The
train/test split is stratified by class and fixed by `split_seed`.

`TensorSet` is the in-memory finite dataset the other finite tasks reuse.
"""

from dataclasses import dataclass

import torch

from ..errors import ConfigError


@dataclass
class TensorSet:
    """A finite dataset held as tensors with a common first dimension."""

    tensors: dict[str, torch.Tensor]

    def __post_init__(self):
        sizes = {v.shape[0] for v in self.tensors.values()}
        if len(sizes) != 1:
            raise ValueError(f"tensors disagree on their first dimension: {sorted(sizes)}")
        self.size = sizes.pop()

    def take(self, index: torch.Tensor) -> dict[str, torch.Tensor]:
        return {k: v[index] for k, v in self.tensors.items()}


class DigitsData:
    def __init__(self, test_fraction: float = 0.2, split_seed: int = 0):
        if not 0.0 < test_fraction < 1.0:
            raise ConfigError("task.data.test_fraction", "must lie strictly between 0 and 1", test_fraction)
        from sklearn.datasets import load_digits
        from sklearn.model_selection import train_test_split

        images, labels = load_digits(return_X_y=True)
        train_idx, test_idx = train_test_split(
            range(len(labels)), test_size=test_fraction, stratify=labels, random_state=split_seed
        )
        x = torch.tensor(images, dtype=torch.float32).view(-1, 1, 8, 8) / 16.0
        y = torch.tensor(labels, dtype=torch.int64)
        train_idx, test_idx = torch.tensor(train_idx), torch.tensor(test_idx)
        self.train = TensorSet({"input": x[train_idx], "target": y[train_idx]})
        self.test = TensorSet({"input": x[test_idx], "target": y[test_idx]})
        self.classes = 10
