"""Large-batch recipe: scaling rules, schedules, parameter groups, clipping, LARS and LAMB."""

from scaledrill.optim.build import build_optimizer, set_lr
from scaledrill.optim.clip import clip_by_global_norm, clip_flat
from scaledrill.optim.lamb import LAMB
from scaledrill.optim.lars import LARS
from scaledrill.optim.recipe import Recipe, render_recipe, resolve_recipe
from scaledrill.optim.scaling import scaled_lr

__all__ = [
    "LAMB", "LARS", "Recipe", "build_optimizer", "clip_by_global_norm", "clip_flat", "render_recipe",
    "resolve_recipe", "scaled_lr", "set_lr",
]
