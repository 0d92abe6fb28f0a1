"""Stock torch models as a user brings them, for the digits task (input [N, 1, 8, 8], 10 classes).

Importable by `_target_` (tests.zoo.NAME) when the repository root is on the path,
as it is for `python -m scaledrill.cli` run from the root (tests/conftest.py's run_cli).
"""

import torch
from torch import nn


class BatchNormMLP(nn.Module):
    def __init__(self, width: int = 16):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, width), nn.BatchNorm1d(width), nn.ReLU(), nn.Linear(width, 10))

    def forward(self, x):
        return self.net(x)


class ConvBatchNorm(nn.Module):
    def __init__(self, width: int = 4):
        super().__init__()
        self.features = nn.Sequential(nn.Conv2d(1, width, 3, padding=1), nn.BatchNorm2d(width), nn.ReLU(), nn.AvgPool2d(2))
        self.head = nn.Linear(width * 16, 10)

    def forward(self, x):
        return self.head(self.features(x).flatten(1))


class SharedLayerNorm(nn.Module):
    """One hidden Linear applied twice (its weight gets two gradient contributions), with LayerNorm."""

    def __init__(self, width: int = 16):
        super().__init__()
        self.inp, self.norm = nn.Linear(64, width), nn.LayerNorm(width)
        self.shared, self.head = nn.Linear(width, width), nn.Linear(width, 10)

    def forward(self, x):
        h = self.norm(self.inp(x.flatten(1)))
        h = torch.tanh(self.shared(torch.tanh(self.shared(h))))
        return self.head(h)


class PaddedGRU(nn.Module):
    """The 8 image rows as a sequence, padded with `pad` zero rows; reads the state after the last real row."""

    def __init__(self, hidden: int = 12, pad: int = 2):
        super().__init__()
        self.pad = pad
        self.gru = nn.GRU(8, hidden, batch_first=True)
        self.head = nn.Linear(hidden, 10)

    def forward(self, x):
        rows = x.reshape(x.shape[0], 8, 8)
        padded = torch.cat([rows, rows.new_zeros(x.shape[0], self.pad, 8)], dim=1)
        out, _ = self.gru(padded)
        return self.head(out[:, 7])


class TransformerDropout(nn.Module):
    """The 8 image rows as tokens through one stock TransformerEncoderLayer (dropout inside)."""

    def __init__(self, dim: int = 16, dropout: float = 0.1, batch_first: bool = True):
        super().__init__()
        self.batch_first = batch_first
        self.embed = nn.Linear(8, dim)
        self.layer = nn.TransformerEncoderLayer(dim, 2, 2 * dim, dropout=dropout, batch_first=batch_first)
        self.drop = nn.Dropout(dropout)
        self.head = nn.Linear(dim, 10)

    def forward(self, x):
        tokens = self.embed(x.reshape(x.shape[0], 8, 8))
        if not self.batch_first:
            tokens = tokens.transpose(0, 1)
        h = self.layer(tokens)
        h = h.mean(dim=1 if self.batch_first else 0)
        return self.head(self.drop(h))


class PixelEmbedding(nn.Module):
    """Each pixel's level 0..16 as a token of an Embedding."""

    def __init__(self, dim: int = 3):
        super().__init__()
        self.embed = nn.Embedding(17, dim)
        self.head = nn.Linear(64 * dim, 10)

    def forward(self, x):
        levels = (x.detach() * 16).round().long().clamp(0, 16).reshape(x.shape[0], 64)
        return self.head(self.embed(levels).flatten(1))


class CastsInput(nn.Module):
    """Fixes its own dtype, as much user code does."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 16), nn.ReLU(), nn.Linear(16, 10))

    def forward(self, x):
        return self.net(x.float())


class Raises(nn.Module):
    def __init__(self):
        super().__init__()
        self.lin = nn.Linear(64, 10)

    def forward(self, x):
        raise RuntimeError("this model is broken on purpose")


class ReturnsTuple(Raises):
    def forward(self, x):
        out = self.lin(x.flatten(1))
        return out, out.detach()


class WrongShape(Raises):
    def forward(self, x):
        return self.lin(x.flatten(1))[:, :3].sum(dim=0)


class ReluTransformerStack(nn.Module):
    """The 8 image rows as tokens through two stock encoder layers with ReLU and dropout:
    rounding meets the ReLU kinks, so float32 moves the first layers by ~1e-3 from float64."""

    def __init__(self, dim: int = 32, dropout: float = 0.1, classes: int = 10):
        super().__init__()
        self.embed = nn.Linear(8, dim)
        layer = nn.TransformerEncoderLayer(dim, 4, 2 * dim, dropout=dropout, batch_first=True)
        self.encoder = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False)
        self.head = nn.Linear(dim, classes)

    def forward(self, x):
        return self.head(self.encoder(self.embed(x.reshape(x.shape[0], -1, 8))).mean(dim=1))


class SignOfSum(torch.utils.data.Dataset):
    """Gaussian sequences of 12 tokens of 8 features; the label is the sign of their sum."""

    def __init__(self, n: int = 1024, seed: int = 0):
        g = torch.Generator().manual_seed(seed)
        self.x = torch.randn(n, 12, 8, generator=g)
        self.y = (self.x.sum((1, 2)) > 0).long()

    def __len__(self):
        return len(self.y)

    def __getitem__(self, i):
        return self.x[i], self.y[i]


class RowsLSTM(nn.Module):
    """The 8 image rows through a stock LSTM: torch on CPU has a bf16 kernel for it but no fp16 one."""

    def __init__(self):
        super().__init__()
        self.lstm = nn.LSTM(8, 16, batch_first=True)
        self.head = nn.Linear(16, 10)

    def forward(self, x):
        out, _ = self.lstm(x.reshape(x.shape[0], 8, 8))
        return self.head(out[:, -1])


class FailsInEval(nn.Module):
    """Trains, then raises in evaluation mode: a user bug no rule names."""

    def __init__(self):
        super().__init__()
        self.fc = nn.Linear(64, 10)

    def forward(self, x):
        if not self.training:
            raise RuntimeError("boom in eval")
        return self.fc(x.reshape(x.shape[0], -1))


class StackedGRU(nn.Module):
    """The 8 image rows through a two-layer stock GRU with between-layer dropout (drawn inside torch's kernel)."""

    def __init__(self, dropout: float = 0.2):
        super().__init__()
        self.gru = nn.GRU(8, 16, num_layers=2, dropout=dropout, batch_first=True)
        self.head = nn.Linear(16, 10)

    def forward(self, x):
        out, _ = self.gru(x.reshape(x.shape[0], 8, 8))
        return self.head(out[:, -1])


class NoisyInput(nn.Module):
    """Adds unkeyed Gaussian noise to its input in training: a random draw no sample key reaches."""

    def __init__(self):
        super().__init__()
        self.fc = nn.Linear(64, 10)

    def forward(self, x):
        x = x.reshape(x.shape[0], -1)
        return self.fc(x + 0.5 * torch.randn_like(x) if self.training else x)
