"""The small proxies users rehearse on, as bench models on a fixed regression set.

Both MLPs take the teacher task's keys (in_dim, hidden, out_dim, depth), so they
plug in with `task=teacher task.model._target_=bench.models.<Name>`:
- LayerNormMLP: input layer, one hidden layer applied `depth` times (a shared
  layer: its gradient sums over the uses), LayerNorm after every hidden layer;
- BatchNormMLP: `depth` hidden layers, each Linear, stock BatchNorm1d, ReLU (the
  engine makes each a per-worker GhostBatchNorm; a plain loop normalises the whole
  batch).
FixedTeacher holds the teacher's first `train_size` samples as tensors, so taking a
batch is an index gather, as in a hand-written loop over an in-memory set.
"""

import torch
from torch import nn

from scaledrill.tasks.digits import TensorSet
from scaledrill.tasks.teacher import TeacherData


class LayerNormMLP(nn.Module):
    def __init__(self, in_dim: int, hidden: int, out_dim: int, depth: int = 2):
        super().__init__()
        self.first = nn.Linear(in_dim, hidden)
        self.shared = nn.Linear(hidden, hidden)
        self.norms = nn.ModuleList(nn.LayerNorm(hidden) for _ in range(depth + 1))
        self.head = nn.Linear(hidden, out_dim)

    def forward(self, x):
        x = torch.relu(self.norms[0](self.first(x)))
        for norm in self.norms[1:]:
            x = torch.relu(norm(self.shared(x)))
        return self.head(x)


class BatchNormMLP(nn.Module):
    def __init__(self, in_dim: int, hidden: int, out_dim: int, depth: int = 2):
        super().__init__()
        widths = [in_dim] + [hidden] * depth
        layers = []
        for a, b in zip(widths[:-1], widths[1:]):
            layers += [nn.Linear(a, b), nn.BatchNorm1d(b), nn.ReLU()]
        self.net = nn.Sequential(*layers, nn.Linear(widths[-1], out_dim))

    def forward(self, x):
        return self.net(x)


class FixedTeacher:
    """TeacherData with its training stream held as `train_size` tensors."""

    def __init__(self, train_size: int = 4096, **kwargs):
        base = TeacherData(**kwargs)
        self.train = TensorSet(base.train.take(torch.arange(train_size)))
        self.test = base.test
