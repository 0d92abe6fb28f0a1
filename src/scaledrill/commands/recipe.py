"""`scaledrill recipe`: print the scaled recipe and write recipe.json; trains nothing."""

from pathlib import Path

from omegaconf import OmegaConf
from rich.console import Console

from scaledrill.config.validate import validate_run
from scaledrill.io import write_json
from scaledrill.optim.recipe import render_recipe, resolve_recipe
from scaledrill.tasks.base import build_task


def recipe_verb(cfg, run_dir: Path) -> None:
    cfg = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    layout = validate_run(cfg)
    size = build_task(cfg.task).data.train.size  # the same resolution `scaledrill run` uses
    recipe = resolve_recipe(cfg, layout, size, cfg.train.tail)
    console = Console()
    console.print(render_recipe(recipe))
    run_dir.mkdir(parents=True, exist_ok=True)
    write_json(run_dir / "recipe.json", recipe.to_json())
    console.print(f"recipe written to {run_dir / 'recipe.json'}")
