"""`scaledrill ladder`: the recipe at growing global batches, each rung to the target (scaledrill.ladder)."""

from concurrent.futures import ProcessPoolExecutor, as_completed
from multiprocessing import get_context
from pathlib import Path

from omegaconf import OmegaConf
from rich.console import Console

from scaledrill.errors import ConfigError
from scaledrill.io import write_json
from scaledrill.ladder.climb import _collected, _job, _rung_and_search, ladder_json
from scaledrill.ladder.rungs import plan_ladder
from scaledrill.ladder.show import LadderDisplay, render_ladder


class Outcome:
    """What the verb returns: the payload, and a failing status when any rung raised."""

    def __init__(self, payload: dict):
        self.payload = payload
        self.exit_code = 1 if any(r.get("error") for r in payload["rungs"]) else 0


def ladder_verb(cfg, run_dir: Path) -> Outcome:
    cfg = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    plan = plan_ladder(cfg)
    if plan.goal_source != "ladder.goal":
        Console(stderr=True).print(plan.goal_source)  # the goal the task declared, or why there is none
    if cfg.ladder.search.enabled:
        from scaledrill.ladder.search import SearchSettings

        SearchSettings.from_config(cfg.ladder.search, plan.check_every)  # bad settings fail before any rung trains
    if (run_dir / "ladder.json").exists():
        raise ConfigError("hydra.run.dir", f"{run_dir} already holds a ladder; choose a new directory", str(run_dir))
    run_dir.mkdir(parents=True, exist_ok=True)
    results: list[dict] = []
    searches = {} if cfg.ladder.search.enabled else None

    def keep(result: dict, search: dict | None) -> None:
        results.append(result)
        if search is not None:
            searches[result["global_batch"]] = search
        write_json(run_dir / "ladder.json", ladder_json(plan, results, searches))

    with LadderDisplay(plan, enabled=bool(cfg.train.progress)) as display:
        if cfg.ladder.parallel == 1:
            for rung in plan.rungs:
                keep(*_rung_and_search(cfg, plan, rung, run_dir, display.start(rung)))
                display.done(results[-1])
        else:
            container = OmegaConf.to_container(cfg)
            with ProcessPoolExecutor(cfg.ladder.parallel, mp_context=get_context("spawn")) as pool:
                jobs = {pool.submit(_job, container, plan, rung, str(run_dir)): rung for rung in plan.rungs}
                try:
                    for job in as_completed(jobs):
                        keep(*_collected(job, cfg, jobs[job], run_dir))
                        display.done(results[-1])
                except BaseException:
                    pool.shutdown(cancel_futures=True)  # the queued rungs must not train once the ladder stops
                    raise
    payload = ladder_json(plan, results, searches)
    Console().print(render_ladder(payload))
    return Outcome(payload)
