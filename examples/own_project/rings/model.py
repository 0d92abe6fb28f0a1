"""A small classifier for 2-D points."""

from torch import nn


class RingNet(nn.Module):
    def __init__(self, hidden: int = 32, classes: int = 3):
        super().__init__()
        self.layers = nn.Sequential(nn.Linear(2, hidden), nn.Tanh(), nn.Linear(hidden, hidden), nn.Tanh(),
                                    nn.Linear(hidden, classes))  # fmt: skip

    def forward(self, x):
        return self.layers(x)
