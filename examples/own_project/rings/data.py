"""Points on three noisy concentric rings; the label is the ring.

A map-style torch Dataset: sample i is drawn from a generator seeded by (seed, i),
so the same index always gives the same sample, whichever worker asks.
"""

import math

import torch
from torch.utils.data import Dataset


class Rings(Dataset):
    def __init__(self, size: int = 3000, noise: float = 0.1, seed: int = 0):
        self.size, self.noise, self.seed = size, noise, seed

    def __len__(self):
        return self.size

    def __getitem__(self, i):
        gen = torch.Generator().manual_seed(self.seed * 1_000_003 + int(i))
        ring = int(torch.randint(3, (), generator=gen))
        angle = float(torch.rand((), generator=gen)) * 2 * math.pi
        radius = 1.0 + ring + self.noise * float(torch.randn((), generator=gen))
        point = torch.tensor([radius * math.cos(angle), radius * math.sin(angle)], dtype=torch.float32)
        return point, ring
