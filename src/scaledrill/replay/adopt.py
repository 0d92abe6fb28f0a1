"""Adopt a checkpoint made outside scaledrill: turn it into a run directory of ours.

Why: the divergence to reproduce usually happened in a plain PyTorch job
(`torch.save({"model": ..., "optimizer": ...})` in a DDP script). `run resume=`,
`replay` and `report` read our checkpoint format and a run's `config.yaml`; this
module writes both from the foreign file and the keys that describe the run
(task, layout, optim, schedule, train.order=torch_distributed for the job's data
order).

How:
1. Load `adopt.from` with `torch.load(weights_only=True)`: no code from the file runs.
2. Take the model's state_dict under `adopt.model_key` (or the whole file when it
   is a bare state_dict; a `module.` prefix from a DistributedDataParallel wrapper
   is dropped) and compare it, name by name and shape by shape, with `task.model`.
3. Move the optimizer state under `adopt.optimizer_key` onto our groups by
   parameter name (adopt_optim.py); check its type and settings against `optim`.
4. With `adopt.scheduler_key`, check that the saved scheduler's next rate equals
   our schedule's rate at `adopt.step`.
5. Every mismatch is one line; any mismatch refuses the file (CheckpointError, exit 4).
6. Write `config.yaml`, `checkpoints/step-N.pt` (our format: the weights, the
   moved optimizer state, step N, a fresh sync state, no telemetry windows) and
   `summary.json`; with `adopt.cluster_log`, the log's rows before step N go into
   `run.sqlite`, so a replay and the report show the run up to the resume point.
"""

import math
from pathlib import Path

import torch
from omegaconf import OmegaConf

from scaledrill.config import rules
from scaledrill.config.validate import validate_run
from scaledrill.dist import LocalCollective
from scaledrill.errors import CheckpointError
from scaledrill.io import write_json
from scaledrill.replay.adopt_optim import adopt_optimizer
from scaledrill.replay.cluster_log import read_cluster_log
from scaledrill.telemetry.store import RunStore
from scaledrill.train import checkpoint
from scaledrill.train.engine import Trainer, config_yaml
from scaledrill.train.run import prepare_run_dir


def _load(path: Path) -> dict:
    """Step 1."""
    if not path.is_file():
        raise CheckpointError(f"adopt.from: {path} is not a file")
    try:
        raw = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:
        if "weights only" in str(err).lower():
            why = "it holds Python objects beyond tensors, numbers and containers, and loading those could run code"
        else:
            why = f"{type(err).__name__}: {str(err).strip().splitlines()[0] if str(err).strip() else 'unreadable'}"
        raise CheckpointError(f"adopt.from: {path} is not a readable torch checkpoint ({why})") from None
    if not isinstance(raw, dict):
        raise CheckpointError(f"adopt.from: {path} holds a {type(raw).__name__}, not a dict of state_dicts or a state_dict")
    return raw


def _is_state_dict(value) -> bool:
    return isinstance(value, dict) and bool(value) and all(isinstance(v, torch.Tensor) for v in value.values())


def model_state(raw: dict, key, path: Path) -> dict:
    """Step 2's state_dict: raw[key], or raw itself when it is a bare state_dict."""
    if key and key in raw:
        found = raw[key]
    elif _is_state_dict(raw):
        found = raw
    else:
        keys = ", ".join(map(str, list(raw)[:8]))
        raise CheckpointError(f"adopt.model_key: {key!r} is not in {path} (its keys: {keys}), and the file is not a bare state_dict")
    if not _is_state_dict(found):
        raise CheckpointError(f"adopt.model_key: {path}[{key!r}] is not a state_dict of tensors")
    if all(k.startswith("module.") for k in found):
        found = {k.removeprefix("module."): v for k, v in found.items()}  # saved from a DDP wrapper
    return found


def model_problems(model: torch.nn.Module, saved: dict, where: str) -> list[str]:
    """Step 2's comparison: one line per missing, extra or reshaped tensor."""
    ours = model.state_dict()
    lines = [f"{where}: {name} of task.model is missing from the file" for name in ours if name not in saved]
    lines += [f"{where}: {name} in the file is not in task.model" for name in saved if name not in ours]
    lines += [
        f"{where}: {name} has shape {list(saved[name].shape)} in the file, {list(t.shape)} in task.model"
        for name, t in ours.items() if name in saved and saved[name].shape != t.shape
    ]
    return lines


def scheduler_problems(raw: dict, key: str, trainer: Trainer, step: int, path: Path) -> list[str]:
    """Step 4."""
    if key not in raw:
        return [f"adopt.scheduler_key: {key!r} is not in {path}"]
    saved = raw[key]
    last = saved.get("_last_lr") if isinstance(saved, dict) else None
    if not last:
        return [f"adopt.scheduler_key: {path}[{key!r}] is not a torch LR scheduler state_dict (no _last_lr)"]
    ours = trainer.recipe.lr_at(step)
    theirs = float(last[0])
    if not math.isclose(theirs, ours, rel_tol=1e-6, abs_tol=1e-12):
        return [f"adopt.scheduler_key: the saved scheduler's rate for step {step} is {theirs:.6g}, "
                f"the schedule, scaling and optim keys give {ours:.6g}"]
    return []


def _import_log(run_dir: Path, log_path, step: int, yaml: str) -> int:
    """Step 6: the cluster log's rows before `step` as the run store's scalars; returns how many."""
    log = read_cluster_log(log_path)
    store = RunStore(run_dir / "run.sqlite")
    store.start("adopt", yaml)
    rows = 0
    for i, s in enumerate(log.steps.tolist()):
        if s < step:
            scalars = {"loss": float(log.loss[i])}
            for name in ("grad_norm", "lr"):
                column = getattr(log, name)
                if column is not None and not math.isnan(column[i]):
                    scalars[name] = float(column[i])
            store.log_scalars(int(s), scalars)
            rows += 1
    store.close("adopted")
    return rows


def adopt(cfg, run_dir: Path) -> dict:
    """Steps 1-6; returns what adopt.json records."""
    node = cfg.adopt
    rules.check_adopt(node)
    step = node.step
    run_cfg = OmegaConf.create({k: v for k, v in OmegaConf.to_container(cfg, resolve=True).items() if k != "adopt"})
    run_cfg.resume = None
    validate_run(run_cfg)
    rules.check_adopted_length(step, run_cfg.train)
    path = Path(str(node["from"])).expanduser()
    raw = _load(path)
    local = OmegaConf.merge(run_cfg, {"layout": {"procs": 1, "backend": "local"}})
    trainer = Trainer(local, LocalCollective())
    saved_model = model_state(raw, node.get("model_key"), path)
    problems = model_problems(trainer.model, saved_model, "adopt.model_key")
    okey, moved = node.get("optimizer_key"), None
    if okey and okey in raw:
        moved, lines = adopt_optimizer(raw[okey], trainer.optimizer, trainer.model, run_cfg.optim.name, "adopt.optimizer_key")
        problems += lines
    if node.get("scheduler_key"):
        problems += scheduler_problems(raw, node.scheduler_key, trainer, step, path)
    if problems:
        raise CheckpointError(f"adopt.from: {path} does not fit the run described:\n" + "\n".join(problems))

    trainer.model.load_state_dict(saved_model)
    if moved is not None:
        trainer.optimizer.load_state_dict(moved)
    trainer.step_index = step
    prepare_run_dir(run_dir, run_cfg)
    written = checkpoint.save(trainer, None, run_dir / "checkpoints")
    log_rows = _import_log(run_dir, node.cluster_log, step, config_yaml(run_cfg)) if node.get("cluster_log") else 0
    record = {
        "adopted_from": str(path),
        "step": step,
        "checkpoint": str(written),
        "optimizer_state": "moved by parameter name" if moved is not None else "none in the file: the optimizer starts fresh",
        "cluster_log": str(node.cluster_log) if node.get("cluster_log") else None,
        "cluster_log_rows": log_rows,
    }
    write_json(run_dir / "adopt.json", record)
    layout = trainer.layout
    write_json(run_dir / "summary.json", {
        "task": trainer.task.name, "optimizer": run_cfg.optim.name, "workers": layout.workers, "procs": layout.procs,
        "micro_batch": layout.micro_batch, "accum": layout.accum, "global_batch": layout.global_batch,
        "backend": layout.backend, "steps": step, "final_loss": None, "diverged": False, "stop_reason": None,
        "incidents": [], "last_checkpoint": str(written), "adopted_from": str(path),
    })
    return record
