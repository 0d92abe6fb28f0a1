"""A small CNN for the 8x8 handwritten digits, with ghost batch normalization.

Two 3x3 convolutions, each followed by GhostBatchNorm and ReLU, then 2x2 average
pooling and a linear classifier. Small enough that a step at batch 512 takes
milliseconds on one CPU core, and still past 90% test accuracy in a few epochs.
"""

from torch import nn

from .ghost_bn import GhostBatchNorm


class DigitsNet(nn.Module):
    def __init__(self, width: int = 8, classes: int = 10, group_size: int | None = None):
        super().__init__()
        self.features = nn.Sequential(
            nn.Conv2d(1, width, 3, padding=1, bias=False),
            GhostBatchNorm(width, group_size),
            nn.ReLU(),
            nn.AvgPool2d(2),  # 8x8 -> 4x4
            nn.Conv2d(width, 2 * width, 3, padding=1, bias=False),
            GhostBatchNorm(2 * width, group_size),
            nn.ReLU(),
            nn.AvgPool2d(2),  # 4x4 -> 2x2
        )
        self.head = nn.Linear(2 * width * 4, classes)

    def forward(self, x):
        """x: [N, 1, 8, 8] in [0, 1] -> logits [N, classes]."""
        return self.head(self.features(x).flatten(1))
