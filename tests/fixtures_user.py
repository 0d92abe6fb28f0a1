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
