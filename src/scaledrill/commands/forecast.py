"""`scaledrill forecast`: project step time, time to target and cost on a described cluster.

Why a verb of its own: the rehearsal measures what the model costs per sample and
how many steps each batch needs; the forecast turns that into the bill for the
cluster in `forecast` (configs/forecast/). Measured inputs beat typed ones, so:

1. FLOPs per sample are counted on the task's model and the gradient bytes read
   off its parameters, unless `forecast.flops_per_sample` / `forecast.grad_bytes`
   are given.
2. The compression ratio is `forecast.compression_ratio`, else the one the run
   at `forecast.run` reports in its summary.json, else 1.
3. The rungs (global batch, steps to target) come from the ladder at
   `forecast.ladder`; without one, the step time alone is projected for the
   global batches in `batches`.
4. The table is printed with the caution as its caption, and forecast.json is
   written into the verb's output directory with every assumption and source.
"""

import json
import math
from pathlib import Path

import torch
from omegaconf import OmegaConf
from rich.console import Console

from scaledrill.errors import ConfigError, is_number, is_whole
from scaledrill.forecast import flops_per_sample, forecast_json, param_bytes, project_rungs, render_forecast, validate


def read_result(key: str, value: str, name: str) -> dict:
    """The JSON object `name` in the directory `value` (or the file itself), or a ConfigError on `key`."""
    path = Path(value).expanduser()
    target = path / name if path.is_dir() else path
    if not target.is_file():
        raise ConfigError(key, f"must be a directory holding {name}, or that file", value)
    try:
        doc = json.loads(target.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise ConfigError(key, f"{target} is not readable JSON ({err})", value) from None
    if not isinstance(doc, dict):
        raise ConfigError(key, f"{target} must hold a JSON object", value)
    return doc


def _positive(value) -> bool:
    return is_number(value) and math.isfinite(value) and value > 0


def ladder_rungs(value: str) -> list[dict]:
    """Step 3: {global_batch, steps_to_target} of every rung of a ladder.json."""
    rungs = read_result("forecast.ladder", value, "ladder.json").get("rungs")
    if not isinstance(rungs, list) or not rungs:
        raise ConfigError("forecast.ladder", "ladder.json must list at least one rung under `rungs`", value)
    out = []
    for i, rung in enumerate(rungs):
        batch = rung.get("global_batch") if isinstance(rung, dict) else None
        steps = rung.get("steps_to_target") if isinstance(rung, dict) else None
        if not (is_whole(batch) and batch >= 1) or not (
            steps is None or _positive(steps)
        ):
            raise ConfigError(
                "forecast.ladder", f"rung {i} needs a whole global_batch >= 1 and steps_to_target null or > 0", rung
            )
        out.append({"global_batch": batch, "steps_to_target": steps})
    return out


def run_compression(value: str) -> float | None:
    """Step 2: the compression ratio a run's summary.json reports (None if it has none)."""
    ratio = read_result("forecast.run", value, "summary.json").get("compression_ratio")
    if ratio is not None and not _positive(ratio):
        raise ConfigError("forecast.run", "summary.json's compression_ratio must be > 0", ratio)
    return None if ratio is None else float(ratio)


def _batches(cfg) -> list[dict]:
    batches = OmegaConf.to_container(cfg.batches) if cfg.get("batches") is not None else None
    if not isinstance(batches, list) or not batches or not all(
        is_whole(b) and b >= 1 for b in batches
    ):
        raise ConfigError("batches", "must be a non-empty list of whole global batches >= 1", batches)
    return [{"global_batch": b, "steps_to_target": None} for b in batches]


def measure(task_node, samples: int = 4) -> tuple[float, int, str]:
    """Step 1: (training FLOPs per sample, trainable parameter bytes, task name) of the task's model."""
    from scaledrill.tasks.base import build_task

    task = build_task(task_node)
    size = getattr(task.data.train, "size", None) or samples  # streams have no size
    batch = task.data.train.take(torch.arange(min(samples, size)))
    return flops_per_sample(task.model, batch["input"])["train"], param_bytes(task.model), task.name


def _model_inputs(cfg, sources: dict) -> tuple[float, float]:
    """Step 1: FLOPs per sample and gradient bytes, each given or measured."""
    flops, grad_bytes = cfg.forecast.get("flops_per_sample"), cfg.forecast.get("grad_bytes")
    if flops is not None and grad_bytes is not None:
        sources |= {"flops_per_sample": "given", "grad_bytes": "given"}
        return float(flops), float(grad_bytes)
    measured_flops, measured_bytes, name = measure(cfg.task)
    sources["flops_per_sample"] = "given" if flops is not None else f"counted on task {name}"
    sources["grad_bytes"] = "given" if grad_bytes is not None else f"trainable parameters of task {name}"
    flops = measured_flops if flops is None else flops
    return float(flops), float(measured_bytes if grad_bytes is None else grad_bytes)


def _compression(node, sources: dict) -> float | None:
    """Step 2: the ratio given, else the run's, else None (= 1)."""
    if node.get("compression_ratio") is not None:
        sources["compression_ratio"] = "given"
        return float(node.compression_ratio)
    ratio = run_compression(node.run) if node.get("run") else None
    sources["compression_ratio"] = f"summary.json of {node.run}" if ratio is not None else "none; 1"
    return ratio


def forecast_verb(cfg, run_dir: Path) -> None:
    """Steps 1-4, reading the files first so a bad path fails before the model is built."""
    node, sources = cfg.forecast, {}
    cluster = validate(node)
    if node.get("ladder"):
        rungs, sources["steps_to_target"] = ladder_rungs(node.ladder), f"ladder.json of {node.ladder}"
    else:
        rungs, sources["steps_to_target"] = _batches(cfg), "none; step time only (set forecast.ladder)"
    ratio = _compression(node, sources)
    flops, grad_bytes = _model_inputs(cfg, sources)
    rows = project_rungs(cluster, rungs, flops, grad_bytes, ratio)
    doc = forecast_json(cluster, rows, flops, grad_bytes, ratio, sources)
    Console().print(render_forecast(doc))
    out = Path(run_dir) / "forecast.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(doc, indent=1), encoding="utf-8")
    print(out)
