"""Make a user's stock torch model compute what W separate workers compute.

Stock modules that tie samples together or draw random numbers would make the
simulation depend on the layout:
- BatchNorm1d/2d/3d and SyncBatchNorm normalise over whatever batch they are given
  (all V·b samples of a process on the fused path); each becomes a GhostBatchNorm
  with the same parameters and buffers, whose statistics are per worker (ghost
  batch normalization, Hoffer, Hubara, Soudry 2017, "Train longer, generalize better");
- nn.Dropout draws its mask from torch's generator, whose state depends on how many
  draws came before; each becomes a SampleDropout keyed on the sample (dropout.py);
- MultiheadAttention's attention-weight dropout and the between-layer dropout of a
  stacked RNN, GRU or LSTM are drawn inside torch's kernels, where no key can reach:
  they are set to 0 and said so.

`adapt_model` returns one line saying what changed (empty when nothing did).
"""

from torch import nn

from scaledrill.errors import ConfigError

from scaledrill.nn.dropout import SampleDropout
from scaledrill.nn.ghost_bn import GhostBatchNorm

STOCK_BATCHNORM = (nn.BatchNorm1d, nn.BatchNorm2d, nn.BatchNorm3d, nn.SyncBatchNorm)


def _ghost(bn: nn.Module, name: str) -> GhostBatchNorm:
    if not bn.track_running_stats:
        raise ConfigError("task.model._target_", f"{name} ({type(bn).__name__}) has track_running_stats=False; per-worker "
                          "statistics keep running statistics for evaluation: set it True, or train.convert_batchnorm=false")
    ghost = GhostBatchNorm(bn.num_features, None, bn.eps, bn.momentum, bn.affine)
    ghost.to(bn.running_mean)  # device and floating dtype of the original
    ghost.load_state_dict(bn.state_dict())
    return ghost.train(bn.training)


def _replace(model: nn.Module, name: str, new: nn.Module) -> None:
    parent, _, leaf = name.rpartition(".")
    setattr(model.get_submodule(parent) if parent else model, leaf, new)


def _batch_dims(model: nn.Module) -> dict[str, int]:
    """Which dimension indexes the samples at each dropout of a stock transformer layer with batch_first=False."""
    dims = {}
    for name, m in model.named_modules():
        if isinstance(m, (nn.TransformerEncoderLayer, nn.TransformerDecoderLayer)):
            first = m.self_attn.batch_first
            for child, sub in m.named_modules():
                if isinstance(sub, nn.Dropout):
                    dims[f"{name}.{child}" if name else child] = 0 if first else 1
    return dims


def adapt_model(model: nn.Module, seed: int, batchnorm: bool = True, dropout: bool = True) -> tuple[nn.Module, str]:
    """Convert `model`'s stock BatchNorm (when `batchnorm`) and Dropout (when `dropout`) in place; returns (model, note)."""
    if isinstance(model, STOCK_BATCHNORM + (nn.Dropout,)):
        model = nn.Sequential(model)  # a bare module: give it a parent to be replaced in
    converted_bn, converted_drop, attention, recurrent = [], [], [], []
    dims = _batch_dims(model)
    for name, m in list(model.named_modules()):
        if batchnorm and isinstance(m, STOCK_BATCHNORM):
            _replace(model, name, _ghost(m, name))
            converted_bn.append(f"{name} ({type(m).__name__})")
        elif dropout and type(m) is nn.Dropout:
            _replace(model, name, SampleDropout(m.p, seed, len(converted_drop), dims.get(name, 0)).train(m.training))
            converted_drop.append(name)
        elif dropout and isinstance(m, nn.MultiheadAttention) and m.dropout > 0:
            m.dropout = 0.0
            attention.append(name)
        elif dropout and isinstance(m, nn.RNNBase) and m.dropout > 0:
            m.dropout = 0.0
            recurrent.append(name)
    parts = []
    if converted_bn:
        parts.append(f"per-worker BatchNorm statistics (GhostBatchNorm) for {', '.join(converted_bn)}")
    if converted_drop:
        parts.append(f"sample-keyed dropout masks for {', '.join(converted_drop)}")
    if attention:
        parts.append(f"attention-weight dropout set to 0 in {', '.join(attention)} (drawn inside torch's attention "
                     "kernel, which no sample key reaches)")
    if recurrent:
        parts.append(f"between-layer dropout set to 0 in {', '.join(recurrent)} (drawn inside torch's recurrent "
                     "kernel, which no sample key reaches)")
    note = ("model: " + "; ".join(parts)) if parts else ""
    return model, note


def stock_batchnorm(model: nn.Module) -> list[str]:
    """Names of the stock BatchNorm modules left in `model`."""
    return [name for name, m in model.named_modules() if isinstance(m, STOCK_BATCHNORM)]
