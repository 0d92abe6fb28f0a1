"""The ground truth: the true large batch in float64 with plain torch autograd.

One process, one model, one forward/backward over all B samples of the sampler's
global batch per step, the summed loss divided by the global count of units
(samples, or valid tokens). No simulated workers, no sync layer, no gradient
path of the engine: only the task, the sampler, the recipe's optimizer, schedule
and clipping, so that a shared mistake cannot hide in both sides.

BatchNorm (ghost batch normalization modules, into which stock BatchNorm is always
converted here, whatever train.convert_batchnorm says) normalises either per
worker-sized group of b consecutive samples of the worker-major global batch
(`worker`, what a cluster computes) or over the whole batch (`global`, the true
large batch). Stock dropout becomes sample-keyed dropout, keyed on the global
sample indices and the step as in the engine (scaledrill.nn.stock).

The reference runs in float64 unless the model fixes its own dtype (its forward
fails on float64 but runs on float32, e.g. `self.net(x.float())`): then it runs in
float32 and the check's tolerance says so (`reference_dtype`).
"""

import torch

from scaledrill.check.trajectory import Trajectory
from scaledrill.layout import Layout
from scaledrill.errors import ConfigError
from scaledrill.nn.dropout import key_samples
from scaledrill.nn.ghost_bn import set_group_size
from scaledrill.nn.stock import adapt_model
from scaledrill.optim import build_optimizer, clip_by_global_norm, resolve_recipe, set_lr
from scaledrill.tasks.base import build_task, forward_loss
from scaledrill.tasks.sampler import Sampler

def cast(batch: dict, dtype: torch.dtype) -> dict:
    return {k: v.to(dtype) if v.is_floating_point() else v for k, v in batch.items()}


def global_batches(cfg, data, steps: int, dtype=torch.float64) -> list[dict]:
    """The global batches of the first `steps` steps in worker-major order, with their sample indices."""
    sampler = Sampler(data.train.size, Layout.from_config(cfg.layout), cfg.train.seed, cfg.train.tail)
    out = []
    for s in range(steps):
        index = sampler.global_batch(s)
        out.append(dict(cast(data.train.take(index), dtype), index=index))
    return out


def build_model(cfg, dtype=torch.float64):
    """The task with the same initial parameters the engine starts from (same seed, same order),
    stock BatchNorm and dropout converted as the engine converts them; `task.note` says what changed."""
    torch.manual_seed(cfg.train.seed)
    task = build_task(cfg.task)
    task.model, task.note = adapt_model(task.model, cfg.train.seed)
    task.model.to(dtype).train()
    return task


def model_dtype(cfg) -> tuple[torch.dtype, str, str]:
    """(float64, or float32 when the model fixes its own dtype (runs on float32 only), the reason, the model's conversion note)."""
    task = build_model(cfg)
    batch = global_batches(cfg, task.data, 1)[0]
    few = {k: v[:2] for k, v in batch.items()}
    set_group_size(task.model, 2)
    try:
        forward_loss(task.model, task.loss, few)
        return torch.float64, "", task.note
    except ConfigError as wide:
        task.model.float()
        try:
            forward_loss(task.model, task.loss, cast(few, torch.float32))
        except ConfigError:
            raise wide from None  # broken in any dtype: name the float64 failure
        why = wide.rule.split(" raised ")[-1] if " raised " in wide.rule else wide.rule.rpartition(" (")[2].split(");")[0]
        return torch.float32, f"the model fixes its own dtype (in float64: {why[:160]})", task.note


def mean_loss(task, batch: dict) -> torch.Tensor:
    """Σ unit losses / number of units in `batch`: the true batch's mean loss."""
    value = forward_loss(task.model, task.loss, batch)
    return value / task.loss.count(batch).to(value.dtype)


def reference(cfg, steps: int, batchnorm: str = "worker", model_hook=None, dtype=torch.float64) -> Trajectory:
    """The trajectory of the true batch (float64, or `dtype`). `model_hook(model)` may alter the model (diagnosis)."""
    layout = Layout.from_config(cfg.layout)
    task = build_model(cfg, dtype)
    if model_hook is not None:
        model_hook(task.model)
    set_group_size(task.model, layout.micro_batch if batchnorm == "worker" else layout.global_batch)
    named = list(task.model.named_parameters())
    params = [p for _, p in named]
    optimizer = build_optimizer(named, cfg.optim)
    recipe = resolve_recipe(cfg, layout, task.data.train.size, cfg.train.tail)
    out = Trajectory([n for n, _ in named])
    for step, batch in enumerate(global_batches(cfg, task.data, steps, dtype)):
        key_samples(task.model, batch["index"], step)
        grads = torch.autograd.grad(mean_loss(task, batch), params)
        for p, g in zip(params, grads):
            p.grad = g
        clip_by_global_norm(params, cfg.optim.clip_norm)
        set_lr(optimizer, recipe.lr_at(step))
        optimizer.step()
        out.record(params)
    return out
