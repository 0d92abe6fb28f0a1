"""FLOPs per sample and gradient bytes of the real model, counted without its memory.

Why: the model the cluster trains is often far larger than the rehearsal's, too
large to build here (a 350M-parameter transformer holds 1.4 GB of float32 weights
before its gradients). Built under `torch.device("meta")`, every tensor has a
shape and a dtype but no storage, and torch's flop counter
(`torch.utils.flop_counter.FlopCounterMode`) counts matmuls and convolutions from
shapes alone, so the forward and backward of the real model are counted in a
moment. The settings (group `forecast`):

- `model`: a node with `_target_` naming the model class (or function) and its
  keyword arguments, as Hydra builds it;
- `sample_shape`: the shape of ONE sample, without the batch dimension
  (e.g. [3, 224, 224] for images, [2048] for a sequence of token ids);
- `sample_dtype`: the input's dtype (float32 for images, int64 for token ids).
"""

import torch
from hydra.errors import InstantiationException
from hydra.utils import instantiate

from scaledrill.errors import ConfigError, is_whole
from scaledrill.forecast.flops import flops_per_sample, param_bytes

DTYPES = {"float32": torch.float32, "float16": torch.float16, "bfloat16": torch.bfloat16, "int64": torch.int64,
          "int32": torch.int32}  # fmt: skip
COUNT_BATCH = 2  # samples counted; FLOPs of these models grow linearly with the batch


def _shape(value) -> tuple[int, ...]:
    shape = list(value) if isinstance(value, (list, tuple)) or hasattr(value, "__iter__") else None
    if not shape or not all(is_whole(d) and d >= 1 for d in shape):
        raise ConfigError("forecast.sample_shape", "must list the whole sizes >= 1 of one sample, e.g. [3, 224, 224]",
                          value)  # fmt: skip
    return tuple(shape)


def sample_input(shape_value, dtype_name) -> torch.Tensor:
    """A batch of COUNT_BATCH samples of shape `sample_shape` on the meta device."""
    name = dtype_name or "float32"
    if name not in DTYPES:
        raise ConfigError("forecast.sample_dtype", f"must be one of {', '.join(DTYPES)}", dtype_name)
    return torch.empty((COUNT_BATCH, *_shape(shape_value)), dtype=DTYPES[name], device="meta")


def build_on_meta(node) -> torch.nn.Module:
    """The model of `forecast.model`, every parameter on the meta device."""
    if node is None or "_target_" not in node:
        raise ConfigError("forecast.model", "needs a _target_ naming the model class to count")
    try:
        with torch.device("meta"):
            model = instantiate(node, _convert_="all")
    except InstantiationException as err:
        cause = err.__cause__ or err
        raise ConfigError("forecast.model._target_", f"could not import or build {node['_target_']!r}: {cause}") from None
    except Exception as err:  # the user's constructor raised
        raise ConfigError("forecast.model._target_", f"building {node['_target_']!r} failed: {err}") from None
    if not isinstance(model, torch.nn.Module):
        raise ConfigError("forecast.model._target_", f"must build a torch.nn.Module, got {type(model).__name__}")
    return model


def count_model(node, sample_shape, sample_dtype=None) -> dict:
    """{"forward", "backward", "train"} FLOPs per sample, "grad_bytes" and "parameters" of the model
    described by `forecast.model`, never allocated."""
    model = build_on_meta(node)
    batch = sample_input(sample_shape, sample_dtype)
    try:
        flops = flops_per_sample(model, batch)
    except Exception as err:  # a forward that does not accept this input
        raise ConfigError(
            "forecast.sample_shape",
            f"the model's forward failed on a meta batch of shape {list(batch.shape)} ({batch.dtype}): {err}",
            list(batch.shape[1:]),
        ) from None
    params = sum(p.numel() for p in model.parameters() if p.requires_grad)
    return flops | {"grad_bytes": param_bytes(model), "parameters": params}
