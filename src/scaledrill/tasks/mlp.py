"""A plain ReLU multilayer perceptron: the student of the teacher-student task."""

from torch import nn


class MLP(nn.Module):
    """`depth` hidden layers of width `hidden`; depth 0 is a linear map."""

    def __init__(self, in_dim: int, hidden: int, out_dim: int, depth: int = 2):
        super().__init__()
        if depth < 0:
            raise ValueError(f"depth must be >= 0, got {depth}")
        widths = [in_dim] + [hidden] * depth
        layers = []
        for a, b in zip(widths[:-1], widths[1:]):
            layers += [nn.Linear(a, b), nn.ReLU()]
        layers.append(nn.Linear(widths[-1], out_dim))
        self.net = nn.Sequential(*layers)

    def forward(self, x):
        return self.net(x)
