"""Standard architectures written with torch.nn for the outside checks of the FLOP counter.

ResNet-50 as first published (He et al. 2016, "Deep Residual Learning for Image
Recognition", Table 1): bottleneck blocks [3, 4, 6, 3], the stride on each stage's
first 1×1 convolution. A GPT-style decoder (Radford et al. 2019): token and position
embeddings, pre-norm blocks of causal self-attention and a 4·d MLP, a language-model head.
"""

import torch
from torch import nn


class Bottleneck(nn.Module):
    def __init__(self, cin: int, width: int, stride: int):
        super().__init__()
        cout = 4 * width
        self.body = nn.Sequential(
            nn.Conv2d(cin, width, 1, stride, bias=False), nn.BatchNorm2d(width), nn.ReLU(),
            nn.Conv2d(width, width, 3, 1, 1, bias=False), nn.BatchNorm2d(width), nn.ReLU(),
            nn.Conv2d(width, cout, 1, bias=False), nn.BatchNorm2d(cout),
        )  # fmt: skip
        self.skip = (
            nn.Sequential(nn.Conv2d(cin, cout, 1, stride, bias=False), nn.BatchNorm2d(cout))
            if stride != 1 or cin != cout else nn.Identity()
        )  # fmt: skip

    def forward(self, x):
        return torch.relu(self.body(x) + self.skip(x))


class ResNet50(nn.Module):
    def __init__(self, classes: int = 1000):
        super().__init__()
        layers = [nn.Conv2d(3, 64, 7, 2, 3, bias=False), nn.BatchNorm2d(64), nn.ReLU(), nn.MaxPool2d(3, 2, 1)]
        cin = 64
        for i, (width, blocks) in enumerate(((64, 3), (128, 4), (256, 6), (512, 3))):
            for b in range(blocks):
                layers.append(Bottleneck(cin, width, 2 if b == 0 and i > 0 else 1))
                cin = 4 * width
        self.features = nn.Sequential(*layers, nn.AdaptiveAvgPool2d(1), nn.Flatten())
        self.head = nn.Linear(cin, classes)

    def forward(self, x):
        return self.head(self.features(x))


class Block(nn.Module):
    def __init__(self, d: int, heads: int):
        super().__init__()
        self.norm1, self.norm2 = nn.LayerNorm(d), nn.LayerNorm(d)
        self.attn = nn.MultiheadAttention(d, heads, batch_first=True)
        self.mlp = nn.Sequential(nn.Linear(d, 4 * d), nn.GELU(), nn.Linear(4 * d, d))

    def forward(self, x, mask):
        h = self.norm1(x)
        x = x + self.attn(h, h, h, attn_mask=mask, need_weights=False)[0]
        return x + self.mlp(self.norm2(x))


class GPT(nn.Module):
    """token ids [N, T] (int64) -> logits [N, T, vocab]."""

    def __init__(self, vocab: int = 50257, d: int = 1024, layers: int = 24, heads: int = 16, context: int = 1024):
        super().__init__()
        self.tokens, self.positions = nn.Embedding(vocab, d), nn.Embedding(context, d)
        self.blocks = nn.ModuleList(Block(d, heads) for _ in range(layers))
        self.norm, self.head = nn.LayerNorm(d), nn.Linear(d, vocab, bias=False)
        self.head.weight = self.tokens.weight  # tied, as in GPT-2

    def forward(self, ids):
        T = ids.shape[1]
        mask = torch.ones(T, T, dtype=torch.bool, device=ids.device).triu(1)  # True: may not attend
        x = self.tokens(ids) + self.positions(torch.arange(T, device=ids.device))
        for block in self.blocks:
            x = block(x, mask)
        return self.head(self.norm(x))
