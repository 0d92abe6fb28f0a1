"""`scaledrill recipe`: print the scaled recipe and write recipe.json; trains nothing.

With a described real job (`job.dataset_size` and `job.epochs`, or `job.steps`;
configs/job/) the same optim, scaling and schedule groups are also resolved on the
job's dataset and length, and printed beside the rehearsal's. A rehearsal task
smaller than one global batch then only loses its own column, with the reason.
"""

from pathlib import Path

from omegaconf import OmegaConf
from rich.console import Console

from scaledrill.config.validate import validate_job_recipe, validate_run, validated_job
from scaledrill.errors import DataError
from scaledrill.io import write_json
from scaledrill.optim.job import job_recipe
from scaledrill.optim.recipe import render_recipe, resolve_recipe
from scaledrill.tasks.base import build_task


def recipe_verb(cfg, run_dir: Path) -> None:
    cfg = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    layout = validate_run(cfg)
    job = validated_job(cfg.get("job"))
    real = None
    if job.described:
        validate_job_recipe(cfg, layout, job)
        real = job_recipe(cfg, layout, job)
    size = build_task(cfg.task).data.train.size  # the same resolution `scaledrill run` uses
    rehearsal, skipped = None, None
    try:
        rehearsal = resolve_recipe(cfg, layout, size, cfg.train.tail)
    except DataError as err:
        if real is None:
            raise
        skipped = f"rehearsal task {cfg.task.get('name', 'custom')}: {err}"
    console = Console()
    if real is None:
        console.print(render_recipe(rehearsal))
        doc = rehearsal.to_json()
    else:
        columns = {"real job (job.*)": real} | ({} if rehearsal is None else {"rehearsal (train.steps)": rehearsal})
        console.print(render_recipe(columns))
        if skipped:
            console.print(f"no rehearsal column: {skipped}")
        # the rehearsal's keys stay at the top level, as without a job
        doc = (rehearsal.to_json() if rehearsal else {}) | {"job": job.to_json(), "real_job": real.to_json()}
        if skipped:
            doc["rehearsal_skipped"] = skipped
    run_dir.mkdir(parents=True, exist_ok=True)
    write_json(run_dir / "recipe.json", doc)
    console.print(f"recipe written to {run_dir / 'recipe.json'}")
