"""`scaledrill replay`: continue a run from a checkpoint under several overrides, side by side.

Why: after a run diverged (here or on a cluster), the question is which change
would have saved it. A replay answers by continuing the very same state, step for
step, with each variant of the recipe, plus the unchanged recipe ("original"),
which continues bitwise like the run itself did.

How:
1. Find the checkpoint (`replay.from`: a file, or a run directory, whose newest
   checkpoint taken before its first detector event is used) and the run
   directory it belongs to (a file's parent's parent), with its `config.yaml`.
2. Rebuild the overrides of that config (config/overrides.py; with the run's own
   config directories, recorded in its .hydra/) and compose each
   variant as the original's overrides plus the variant's own, so group swaps
   (`optim=lamb`) behave as on the command line. The schedule keeps the
   original's horizon (`schedule.total_steps`, else its train.steps) when
   `replay.steps` runs shorter or longer, so the "original" variant sees the
   rates the run saw; a variant that sets any `schedule` key changes the
   schedule on purpose and spans its own run length unless it sets the horizon. Check every variant before any
   trains: same workers, micro-batch and accumulation as the checkpoint.
3. A variant that changes the optimizer or the sync layer cannot take their saved
   state as it is: it gets a start checkpoint in its own directory holding the
   new optimizer's hyperparameters (and its fresh state when the optimizer kind
   changed) and a fresh sync state. Everything else (weights, step, data
   position, telemetry windows, RNG) is the checkpoint's.
4. Run each variant into `variant-NAME/` with runs.run_verb, then show them
   (replay_show.py) and write `replay.json`.
"""

import shlex
from pathlib import Path

import torch
from omegaconf import OmegaConf

from scaledrill.config.keys import composition_error, refuse_unknown
from scaledrill.config.overrides import compose_run, hydra_session, rebuild_overrides, search_dirs
from scaledrill.config.validate import validated_layout
from scaledrill.errors import CheckpointError, ConfigError
from scaledrill.telemetry.store import read_events
from scaledrill.train import checkpoint


def find_source(where) -> tuple[Path, Path]:
    """Step 1: (checkpoint file, run directory of the run that wrote it)."""
    path = Path(str(where))
    if path.is_dir():
        run_dir = path.parent if path.name == "checkpoints" else path
        return _before_first_event(run_dir), run_dir
    ckpt = checkpoint.find(path)
    return ckpt, ckpt.parent.parent


def _before_first_event(run_dir: Path) -> Path:
    """The newest checkpoint whose weights predate the first detector event (all of them if none)."""
    found = sorted((run_dir / "checkpoints").glob("step-*.pt"))
    store = run_dir / "run.sqlite"
    events = [e["step"] for e in read_events(store) if e["kind"] == "detector"] if store.is_file() else []
    if events:  # the loss at step e was computed with the weights after e steps: those are already bad
        found = [p for p in found if int(p.stem.split("-")[1]) < min(events)]
    if not found:
        raise CheckpointError(f"replay.from: no checkpoint in {run_dir / 'checkpoints'}" + (f" before step {min(events)}, where a detector fired" if events else ""))
    return found[-1]


def variant_overrides(node) -> dict[str, list[str]]:
    """`replay.variants` as name -> override list; a string value is split like a shell line."""
    out = {}  # checked by config/rules.py (check_replay)
    for name, value in (OmegaConf.to_container(node, resolve=True) if node is not None else {}).items():
        out[str(name)] = list(shlex.split(value) if isinstance(value, str) else value)
    return out


def _touches_schedule(overrides: list[str]) -> bool:
    keys = (s.split("=")[0].lstrip("+~") for s in overrides)
    return any(k == "schedule" or k.startswith("schedule.") for k in keys)


def original_horizon(saved: dict) -> int:
    """Steps the original run's schedule spans: its schedule.total_steps, else its train.steps."""
    return saved.get("schedule", {}).get("total_steps") or saved["train"]["steps"]


def compose_variants(saved: dict, where: str, ckpt: Path, steps: int, variants: dict) -> dict:
    """Step 2: name -> resolved run config, the original first."""
    base = rebuild_overrides(saved, where, search_dirs(Path(where).parent))
    horizon = original_horizon(saved)
    out = {}
    with hydra_session():
        for name, extra in {"original": [], **variants}.items():
            keep = [] if _touches_schedule(extra) else [f"++schedule.total_steps={horizon}"]
            try:
                cfg = compose_run([*base, *extra, *keep, f"train.steps={steps}", f"resume={render_path(ckpt)}"])
                refuse_unknown(cfg)
            except ConfigError as err:
                raise ConfigError(f"replay.variants.{name}", f"cannot compose: {err}", extra) from None
            except Exception as err:  # Hydra's: an unknown key or option, a wrong type
                raise ConfigError(f"replay.variants.{name}", f"cannot compose: {composition_error(err)}", extra) from None
            out[name] = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    return out


def render_path(path: Path) -> str:
    return "'" + str(path).replace("\\", "\\\\").replace("'", "\\'") + "'"


def check_layout(name: str, cfg, state: dict) -> None:
    """A variant keeps the checkpoint's workers, micro-batch and accumulation (the resume rule of train/checkpoint.py)."""
    change = checkpoint.layout_change(state, validated_layout(cfg.layout))
    if change is not None:
        key, saved, now = change
        raise ConfigError(
            f"replay.variants.{name}",
            f"changes layout.{key} to {now}, but the checkpoint was made with {saved}; "
            "a replay may change layout.procs and layout.backend only",
        )


def start_checkpoint(cfg, original, state: dict, directory: Path) -> Path | None:
    """Step 3: a start checkpoint for a variant whose optimizer or sync differs; None when the saved one serves."""
    new_optim, new_sync = cfg.optim != original.optim, cfg.sync != original.sync
    if not (new_optim or new_sync):
        return None
    from scaledrill.dist import LocalCollective
    from scaledrill.train.engine import Trainer

    local = OmegaConf.merge(cfg, {"layout": {"procs": 1, "backend": "local"}, "resume": None})
    fresh = checkpoint.collect(Trainer(local, LocalCollective()), None)
    derived = {k: v for k, v in state.items() if k != "path"}
    if new_optim:
        same_kind = cfg.optim.name == original.optim.name
        derived["optimizer"] = {
            "state": state["optimizer"]["state"] if same_kind else {},
            "param_groups": fresh["optimizer"]["param_groups"],
        }
    if new_sync:
        derived["sync"] = fresh["sync"]
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / f"start-{int(state['step']):07d}.pt"
    torch.save(derived, path)
    return path
