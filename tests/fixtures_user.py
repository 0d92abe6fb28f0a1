"""Models and data written the way a user writes them (stock torch modules, no scaledrill),
for tests that plug them in through `task.model._target_=tests.fixtures_user.NAME`."""

import torch
from torch import nn


class BatchNormMLP(nn.Module):
    """An ordinary MLP with stock nn.BatchNorm1d, for the digits task (8×8 images, 10 classes)."""

    def __init__(self, hidden: int = 32, classes: int = 10):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, hidden), nn.BatchNorm1d(hidden), nn.ReLU(), nn.Linear(hidden, classes))

    def forward(self, x):
        return self.net(x)


class TinyNet(nn.Module):
    """A small classifier a user might train with a plain DDP script."""

    def __init__(self, in_dim: int = 4, hidden: int = 16, classes: int = 3, activation: str = "tanh"):
        super().__init__()
        self.hidden = nn.Linear(in_dim, hidden)
        self.out = nn.Linear(hidden, classes)
        self.activation = getattr(torch, activation)

    def forward(self, x):
        return self.out(self.activation(self.hidden(x)))


class DropoutNet(TinyNet):
    """TinyNet with a stock nn.Dropout after its hidden layer."""

    def __init__(self, p: float = 0.3, **kw):
        super().__init__(**kw)
        self.drop = nn.Dropout(p)

    def forward(self, x):
        return self.out(self.drop(self.activation(self.hidden(x))))


def blobs(size: int = 96, in_dim: int = 4, classes: int = 3, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """Gaussian inputs labelled by a fixed random linear map: the job's whole training set."""
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(size, in_dim, generator=gen)
    y = (x @ torch.randn(in_dim, classes, generator=gen)).argmax(-1)
    return x, y


class _Indexed:
    def __init__(self, x, y):
        self.x, self.y, self.size = x, y, x.shape[0]

    def take(self, index):
        return {"input": self.x[index], "target": self.y[index]}


class BlobData:
    """The same training set seen through scaledrill's data protocol (a `train` with `size` and `take`)."""

    def __init__(self, size: int = 96, seed: int = 0):
        self.train = _Indexed(*blobs(size, seed=seed))


class CorruptedBlobData:
    """BlobData with one corrupted sample: its input scaled by `factor`, as a bad record in a shard would be."""

    def __init__(self, size: int = 512, bad: int = 0, factor: float = 1e4, seed: int = 0):
        x, y = blobs(size, seed=seed)
        x[bad] *= factor
        self.train = _Indexed(x, y)
