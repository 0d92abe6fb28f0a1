"""Large-batch recipe: scaling rules, schedules, parameter groups, clipping, LARS and LAMB."""

from .build import build_optimizer, set_lr
from .clip import clip_by_global_norm
from .lamb import LAMB
from .lars import LARS
from .recipe import Recipe, render_recipe, resolve_recipe, validate
from .scaling import scaled_lr

__all__ = [
    "LAMB", "LARS", "Recipe", "build_optimizer", "clip_by_global_norm", "render_recipe",
    "resolve_recipe", "scaled_lr", "set_lr", "validate",
]
