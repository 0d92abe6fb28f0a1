"""A student for the teacher task whose `late` layer is made to blow up at a chosen step."""

import torch


class BlowUpAfter(torch.nn.Module):
    def __init__(self, in_dim: int = 32, hidden: int = 16, out_dim: int = 8, at: int = 30, factor: float = 1e4):
        super().__init__()
        self.early = torch.nn.Linear(in_dim, hidden)
        self.late = torch.nn.Linear(hidden, out_dim)
        self.forwards = 0  # training forwards so far (one per step on the fused path with k = 1)
        self.late.weight.register_hook(lambda g: g * factor if self.forwards > at else g)

    def forward(self, x):
        if self.training:
            self.forwards += 1
        return self.late(torch.tanh(self.early(x)))
