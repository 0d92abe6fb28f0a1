"""Sample-keyed dropout: a sample's mask depends on (seed, layer, step, its global index) only."""

import torch
from torch import nn

from scaledrill.nn.dropout import SampleDropout, key_samples
from scaledrill.nn.stock import adapt_model


def masked(drop: SampleDropout, x: torch.Tensor, keys: torch.Tensor, step: int = 0) -> torch.Tensor:
    drop.keys, drop.step = keys, step
    return drop(x)


def test_mask_is_the_samples_own_whatever_the_batch():
    drop = SampleDropout(0.3, seed=1).train()
    x, keys = torch.ones(8, 50), torch.arange(100, 108)
    whole = masked(drop, x, keys)
    assert torch.equal(masked(drop, x[4:], keys[4:]), whole[4:])  # a worker's slice sees the same units dropped
    assert not torch.equal(whole[0], whole[1])  # samples differ from each other


def test_mask_changes_with_the_step_and_the_layer():
    x, keys = torch.ones(4, 200), torch.arange(4)
    a = masked(SampleDropout(0.5).train(), x, keys, step=0)
    assert not torch.equal(a, masked(SampleDropout(0.5).train(), x, keys, step=1))
    assert not torch.equal(a, masked(SampleDropout(0.5, layer=1).train(), x, keys, step=0))


def test_keep_rate_and_scale():
    p, n = 0.25, 40_000
    out = masked(SampleDropout(p).train(), torch.ones(8, n // 8), torch.arange(8))
    kept = float((out != 0).float().mean())
    assert abs(kept - (1 - p)) < 3 * ((p * (1 - p)) / n) ** 0.5  # binomial: within 3 standard deviations
    assert torch.allclose(out[out != 0], torch.tensor(1 / (1 - p)))  # inverted dropout keeps the mean


def test_batch_dim_one_masks_the_same_sample_units():
    x, keys = torch.randn(5, 3, 6), torch.arange(3)  # [sequence, sample, feature]
    seq_first = masked(SampleDropout(0.5, batch_dim=1).train(), x, keys)
    batch_first = masked(SampleDropout(0.5).train(), x.transpose(0, 1), keys)
    assert torch.equal(seq_first, batch_first.transpose(0, 1))


def test_adapt_model_converts_stock_modules_and_says_so():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(4, 8), nn.BatchNorm1d(8), nn.Dropout(0.2),
                          nn.TransformerEncoder(nn.TransformerEncoderLayer(8, 2, 16, dropout=0.1), 1, enable_nested_tensor=False))
    model[1].running_mean.fill_(0.5)
    adapted, note = adapt_model(model, seed=3)
    assert type(adapted[1]).__name__ == "GhostBatchNorm" and torch.equal(adapted[1].running_mean, torch.full((8,), 0.5))
    drops = [m for m in adapted.modules() if isinstance(m, SampleDropout)]
    assert [d.batch_dim for d in drops] == [0, 1, 1, 1]  # the transformer layer is sequence-first
    assert len({d.layer for d in drops}) == 4
    assert "BatchNorm1d" in note and "attention-weight dropout set to 0" in note
    assert all(m.dropout == 0 for m in adapted.modules() if isinstance(m, nn.MultiheadAttention))
    key_samples(adapted, torch.arange(2))
    assert all(d.keys is not None for d in drops)
