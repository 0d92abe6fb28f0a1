"""Build a task's model, data and loss from its config node through Hydra `_target_`s.

A plain map-style torch Dataset is wrapped as the task's training data and a plain
torch loss (module or function) as its Loss (adapters.py), so ordinary torch code
plugs in without glue.
"""

import copy
from dataclasses import dataclass
from typing import Any

import torch
from hydra.errors import InstantiationException
from hydra.utils import instantiate
from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import MissingMandatoryValue

from scaledrill.errors import ConfigError
from scaledrill.tasks.adapters import TorchData, TorchLoss


@dataclass
class Task:
    name: str
    model: torch.nn.Module
    data: Any  # .train, optional .test and .evaluate(model)
    loss: Any  # the Loss protocol of scaledrill.tasks


def _build(node, key: str):
    if isinstance(node, DictConfig) and OmegaConf.is_missing(node, "_target_"):
        raise ConfigError(f"{key}._target_", "is required: name your class, e.g. mypkg.MyNet (README: Your own model and data)")
    if node is None or "_target_" not in node:
        raise ConfigError(key, "needs a _target_ naming a class or function to build")
    try:
        return instantiate(node, _convert_="all")
    except MissingMandatoryValue as err:
        raise ConfigError(f"{key}._target_", f"a required value is missing: {err}") from None
    except InstantiationException as err:
        cause = err.__cause__ or err
        raise ConfigError(f"{key}._target_", f"could not import or build {node._target_!r}: {cause}") from None
    except Exception as err:  # a user's constructor raised
        raise ConfigError(f"{key}._target_", f"building {node._target_!r} failed: {err}") from None


def build_task(node) -> Task:
    """The task node has `model`, `data` and `loss` sub-nodes, each with a `_target_`."""
    model = _build(node.get("model"), "task.model")
    if not isinstance(model, torch.nn.Module):
        raise ConfigError("task.model._target_", f"must build a torch.nn.Module, got {type(model).__name__}")
    data = _build(node.get("data"), "task.data")
    if not hasattr(data, "train") and hasattr(data, "__getitem__") and hasattr(data, "__len__"):
        data = TorchData(data)  # a plain map-style torch Dataset: the training set
    if not hasattr(data, "train"):
        raise ConfigError("task.data._target_", "must build a map-style torch Dataset or an object with a `train` dataset")
    loss = _build(node.get("loss"), "task.loss")
    if callable(loss) and not hasattr(loss, "count"):
        loss = TorchLoss(loss)  # a plain torch loss: per-sample units
    if not callable(loss) or not hasattr(loss, "count"):
        raise ConfigError("task.loss._target_", "must build a torch loss or a loss with __call__(output, batch) and count(batch)")
    return Task(name=str(node.get("name", "custom")), model=model, data=data, loss=loss)


def target_name(obj) -> str:
    return f"{type(obj).__module__}.{type(obj).__qualname__}"


def _forward_error(model, err: Exception, forward, inputs) -> ConfigError:
    """The ConfigError for a forward that raised; under autocast it names train.precision when the
    same forward runs in full precision (torch's CPU kernels lack some 16-bit layers, e.g. fp16 LSTM)."""
    said = f"the forward pass of {target_name(model)} raised {type(err).__name__}: {err}"
    if torch.is_autocast_enabled("cpu"):
        dtype = str(torch.get_autocast_dtype("cpu")).removeprefix("torch.")
        try:
            with torch.no_grad(), torch.autocast("cpu", enabled=False):
                forward()
        except Exception:  # noqa: BLE001 - broken in any precision: the model's own error
            return ConfigError("task.model._target_", said)
        precision = {"float16": "fp16", "bfloat16": "bf16"}.get(dtype, dtype)
        other = "bf16" if precision == "fp16" else "fp32"
        return ConfigError("train.precision", f"the forward pass of {target_name(model)} fails under autocast to {dtype} "
                           f"but runs in full precision: torch on this CPU has no {dtype} kernel for one of its layers "
                           f"({type(err).__name__}: {str(err).splitlines()[0][:160]}); try train.precision={other}", precision)
    if _runs_in_float32_only(model, inputs):
        return ConfigError("train.dtype", f"the forward pass of {target_name(model)} fails in float64 but runs in float32: "
                           f"the model fixes its own dtype (e.g. it calls x.float()) ({type(err).__name__}: "
                           f"{str(err).splitlines()[0][:160]}); use train.dtype=float32", "float64")
    return ConfigError("task.model._target_", said)


def _runs_in_float32_only(model, inputs) -> bool:
    """Whether a model with float64 parameters that just failed runs on a float32 copy of itself and its input."""
    if not isinstance(inputs, torch.Tensor) or not any(p.dtype == torch.float64 for p in model.parameters()):
        return False
    try:
        narrow = copy.deepcopy(model).float()
        with torch.no_grad():
            narrow(inputs.float() if inputs.is_floating_point() else inputs)
        return True
    except Exception:  # noqa: BLE001 - broken in float32 too, or not copyable: the model's own error stands
        return False


def forward_loss(model, loss, batch: dict, call=None) -> torch.Tensor:
    """loss(model(batch["input"]), batch), with a user's failing model or loss named as a ConfigError.

    `call(input)` replaces `model(input)` (e.g. a functional call of the same model)."""
    def forward():
        return model(batch["input"]) if call is None else call(batch["input"])

    try:
        out = forward()
    except Exception as err:  # noqa: BLE001 - any failure of user code is reported, not traced back
        raise _forward_error(model, err, forward, batch["input"]) from None
    if not isinstance(out, torch.Tensor):
        raise ConfigError("task.model._target_", f"the forward pass of {target_name(model)} returned a "
                          f"{type(out).__name__}; the loss needs one tensor (return e.g. the logits only)")
    try:
        value = loss(out, batch)
    except Exception as err:  # noqa: BLE001
        raise ConfigError("task.model._target_", f"the loss {target_name(loss)} (task.loss._target_) failed on the "
                          f"output of {target_name(model)}, shaped {list(out.shape)}: {type(err).__name__}: {err}") from None
    if not isinstance(value, torch.Tensor) or value.numel() != 1:
        raise ConfigError("task.loss._target_", f"{target_name(loss)} must return one number (the SUM of the per-unit "
                          f"losses), got {type(value).__name__} {list(getattr(value, 'shape', []))}")
    return value.reshape(())
