"""`scaledrill ladder`: the recipe at growing global batches, each rung to the target.

Why: a recipe stops scaling somewhere. Running it at B0·2^i to a fixed target and
counting the steps shows where doubling the batch stops halving the steps; the
fit of McCandlish et al. 2018 (fit.py) turns the counts into S_min, E_min and the
critical batch, set beside the gradient noise scale each rung measured.

Steps:
1. plan and check every rung (rungs.py) before anything trains;
2. run each rung under the run's scaling rule into LADDER_DIR/rung-B<B>/
   (summary.json, run.sqlite), stopping at the target or at the sample budget;
   the local backend trains in this process, gloo and mpi through `run_verb`
   (they train the whole budget; the first hit is read back from their history);
3. optionally search the rung's lr window (search.py);
4. after every rung rewrite ladder.json atomically, so finished rungs survive a
   later failure; a rung that raises is recorded with its error and the ladder
   goes on (bad configuration, ConfigError, and a signal stop it);
5. print the table and the fit.
"""

import math
import time
from pathlib import Path

from omegaconf import OmegaConf

from scaledrill.dist import LocalCollective
from scaledrill.errors import ConfigError, Interrupted
from scaledrill.io import write_json
from scaledrill.ladder.gather import agreement, ladder_payload  # noqa: F401  (agreement: part of this module's interface)
from scaledrill.ladder.rungs import TRAIN_LOSS, Plan, Rung, Watch, rung_config
from scaledrill.layout import Layout
from scaledrill.optim.scaling import scaled_lr
from scaledrill.train.run import prepare_run_dir, run_verb


def rung_lr(cfg) -> float:
    """The peak rate the scaling rule gives the rung's global batch."""
    s, L = cfg.scaling, cfg.layout
    base = None if s.rule == "none" else s.base_batch
    return scaled_lr(s.rule, s.base_lr, base, Layout.from_config(L).global_batch, s.exponent)


def _in_process(cfg, plan: Plan, run_dir: Path, tick) -> tuple[dict, Watch]:
    from scaledrill.train.engine import run_training

    prepare_run_dir(run_dir, cfg)
    watch = Watch(plan.goal, plan.check_every)

    def on_step(trainer, record):
        tick(trainer.step_index)
        return watch(trainer, record)

    collective = LocalCollective()
    try:
        summary = run_training(cfg, collective, run_dir=run_dir, on_step=on_step)
    finally:
        collective.close()
    write_json(run_dir / "summary.json", summary)
    return summary, watch


def _launched(cfg, plan: Plan, run_dir: Path) -> tuple[dict, Watch]:
    """gloo/mpi rungs cannot stop at the target: they run their whole budget, and the first
    hit is read back from their history at the steps a Watch would have checked."""
    from scaledrill.telemetry.store import read_scalars

    cfg.train.eval_every = plan.check_every
    summary = run_verb(cfg, run_dir)
    scalars = read_scalars(run_dir / "run.sqlite")
    if plan.goal.metric == TRAIN_LOSS:
        steps, values = scalars["loss"]
        # the store keys a step by its index before the update, Watch by the steps done; like
        # Watch, check the last step of the budget too
        checked = [(int(s) + 1, float(v)) for s, v in zip(steps, values)]
        pairs = [(s, v) for s, v in checked if s % plan.check_every == 0 or s == cfg.train.steps]
    else:
        pairs = sorted((int(k), v.get(plan.goal.metric, math.nan)) for k, v in summary["eval_history"].items())
    watch = Watch(plan.goal, plan.check_every)
    for step, value in pairs:
        watch.metric = value
        if plan.goal.met(value):
            watch.reached_step = step
            break
    if watch.reached_step is not None:
        # an in-process rung stops at the hit: its noise scale is the one measured up to there, and
        # a divergence later in the budget is not the rung's
        summary = dict(summary, noise_scale=_logged_at(scalars, "b_simple", watch.reached_step),
                       diverged=summary["diverged"] and summary["steps"] <= watch.reached_step)
    return summary, watch


def _logged_at(scalars: dict, name: str, step: int) -> float | None:
    """The store's value of `name` after `step` steps; None when missing or not finite."""
    steps, values = scalars.get(name, ((), ()))
    found = [float(v) for s, v in zip(steps, values) if int(s) + 1 == step]
    return found[0] if found and math.isfinite(found[0]) else None


def run_rung(cfg, plan: Plan, rung: Rung, ladder_dir: Path, tick=lambda step: None, lr: float | None = None) -> dict:
    """Train one rung (at `lr` instead of the scaling rule's rate when given); the
    record of ladder.json, with an `error` key if it raised."""
    run_cfg = rung_config(cfg, rung, lr=lr)
    run_dir = ladder_dir / rung.name
    out = _record(run_cfg, rung, run_dir)
    started = time.perf_counter()
    try:
        if run_cfg.layout.backend == "local":
            summary, watch = _in_process(run_cfg, plan, run_dir, tick)
        else:
            summary, watch = _launched(run_cfg, plan, run_dir)
    except ConfigError as err:
        raise ConfigError(err.key, f"{err.rule} — at rung B={rung.global_batch}", err.value) from None
    except Interrupted as err:  # the user stopped the ladder: no later rung may start
        done = ladder_dir / "ladder.json"
        kept = f"the rungs finished before it are in {done}" if done.exists() else "no rung had finished"
        raise Interrupted(f"stopped by a signal during rung B={rung.global_batch} (its checkpoint is in "
                          f"{run_dir / 'checkpoints'}); {kept}", err.exit_code - 128) from None
    except KeyboardInterrupt:
        raise
    except Exception as err:  # noqa: BLE001 - recorded; the ladder goes on
        out.update(error=f"{type(err).__name__}: {err}", wall_seconds=time.perf_counter() - started)
        return out
    reached = watch.reached_step
    final = watch.metric if watch.metric is not None else summary.get("final_loss")
    out.update(
        lr=summary.get("peak_lr", out["lr"]), steps_to_target=reached,
        samples_to_target=None if reached is None else reached * rung.global_batch, final_metric=final,
        diverged=bool(summary.get("diverged") or watch.diverged or (final is not None and not math.isfinite(final))),
        noise_scale=summary.get("noise_scale"), wall_seconds=summary.get("wall_seconds"),
    )
    return out


def _record(run_cfg, rung: Rung, run_dir: Path) -> dict:
    """A rung's record of ladder.json before it trains."""
    return {
        "global_batch": rung.global_batch, "workers": rung.workers, "micro_batch": run_cfg.layout.micro_batch,
        "accum": rung.accum, "lr": rung_lr(run_cfg), "steps_to_target": None, "samples_to_target": None,
        "final_metric": None, "diverged": False, "noise_scale": None, "wall_seconds": None, "regime": None,
        "run_dir": str(run_dir),
    }


def _rung_and_search(cfg, plan: Plan, rung: Rung, ladder_dir: Path, tick=lambda step: None) -> tuple[dict, dict | None]:
    result = run_rung(cfg, plan, rung, ladder_dir, tick)
    if not cfg.ladder.search.enabled or result.get("error"):
        return result, None
    from scaledrill.ladder.search import search_lr

    return result, search_lr(cfg, plan, rung, result["lr"]).to_json(plan.goal.reached_when)


def _job(container: dict, plan: Plan, rung: Rung, ladder_dir: str) -> tuple[dict, dict | None]:
    """One rung in a worker process of `ladder.parallel`."""
    import torch

    torch.set_num_threads(1)
    return _rung_and_search(OmegaConf.create(container), plan, rung, Path(ladder_dir))


def _collected(job, cfg, rung: Rung, ladder_dir: Path) -> tuple[dict, dict | None]:
    """The outcome of a pool job; a job that died (its process killed, out of memory) is
    recorded against its rung like a rung that raised, and the ladder goes on."""
    try:
        return job.result()
    except (ConfigError, Interrupted, KeyboardInterrupt):
        raise
    except Exception as err:  # noqa: BLE001 - recorded; the ladder goes on
        out = _record(rung_config(cfg, rung), rung, ladder_dir / rung.name)
        out.update(error=f"{type(err).__name__}: {err}")
        return out, None


def ladder_json(plan: Plan, results: list[dict], searches: dict | None) -> dict:
    """The ladder.json payload (gather.py: also for rungs trained as separate jobs)."""
    limits = {rung.global_batch: rung.limit for rung in plan.rungs}
    return ladder_payload(plan.grow, plan.goal.to_json(), plan.goal_source, results, searches, limits, plan.check_every)
