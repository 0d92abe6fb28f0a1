"""The ground truth: the true large batch in float64 with plain torch autograd.

One process, one model, one forward/backward over all B samples of the sampler's
global batch per step, the summed loss divided by the global count of units
(samples, or valid tokens). No simulated workers, no sync layer, no gradient
path of the engine: only the task, the sampler, the recipe's optimizer, schedule
and clipping, so that a shared mistake cannot hide in both sides.

BatchNorm (ghost batch normalization modules) normalises either per worker-sized
group of b consecutive samples of the worker-major global batch (`worker`, what a
cluster computes) or over the whole batch (`global`, the true large batch).
"""

import torch

from scaledrill.check.trajectory import Trajectory
from scaledrill.layout import Layout
from scaledrill.nn.ghost_bn import set_group_size
from scaledrill.optim import build_optimizer, clip_by_global_norm, resolve_recipe, set_lr
from scaledrill.tasks.base import build_task
from scaledrill.tasks.sampler import Sampler

BATCHNORM = ("worker", "global")


def cast(batch: dict, dtype: torch.dtype) -> dict:
    return {k: v.to(dtype) if v.is_floating_point() else v for k, v in batch.items()}


def global_batches(cfg, data, steps: int) -> list[dict]:
    """The float64 global batches of the first `steps` steps, in worker-major order."""
    sampler = Sampler(data.train.size, Layout.from_config(cfg.layout), cfg.train.seed, cfg.train.tail)
    return [cast(data.train.take(sampler.global_batch(s)), torch.float64) for s in range(steps)]


def build_model(cfg, dtype=torch.float64):
    """The task with the same initial parameters the engine starts from (same seed, same order)."""
    torch.manual_seed(cfg.train.seed)
    task = build_task(cfg.task)
    task.model.to(dtype).train()
    return task


def mean_loss(task, batch: dict) -> torch.Tensor:
    """Σ unit losses / number of units in `batch`: the true batch's mean loss."""
    return task.loss(task.model(batch["input"]), batch) / task.loss.count(batch).to(torch.float64)


def reference(cfg, steps: int, batchnorm: str = "worker", model_hook=None) -> Trajectory:
    """The float64 trajectory of the true batch. `model_hook(model)` may alter the model (diagnosis)."""
    layout = Layout.from_config(cfg.layout)
    task = build_model(cfg)
    if model_hook is not None:
        model_hook(task.model)
    set_group_size(task.model, layout.micro_batch if batchnorm == "worker" else layout.global_batch)
    named = list(task.model.named_parameters())
    params = [p for _, p in named]
    optimizer = build_optimizer(named, cfg.optim)
    recipe = resolve_recipe(cfg, layout, task.data.train.size, cfg.train.tail)
    out = Trajectory([n for n, _ in named])
    for step, batch in enumerate(global_batches(cfg, task.data, steps)):
        grads = torch.autograd.grad(mean_loss(task, batch), params)
        for p, g in zip(params, grads):
            p.grad = g
        clip_by_global_norm(params, cfg.optim.clip_norm)
        set_lr(optimizer, recipe.lr_at(step))
        optimizer.step()
        out.record(params)
    return out
