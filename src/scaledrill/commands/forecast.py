"""`scaledrill forecast`: project step time, time to target and cost on a described cluster.

Why a verb of its own: the rehearsal measures what the model costs per sample and
how many steps each batch needs; the forecast turns that into the bill for the
cluster in `forecast` (configs/forecast/). Measured inputs beat typed ones, so:

1. FLOPs per sample (one forward plus one backward) are counted on the real model
   `forecast.model` built on the meta device (forecast/model.py; no memory held),
   else on the task's model, and the gradient bytes read off its parameters,
   unless `forecast.flops_per_sample` / `forecast.grad_bytes` are given.
2. The compression ratio is `forecast.compression_ratio`, else the one the run
   at `forecast.run` reports in its summary.json, else 1.
3. The rungs (global batch, steps to target) come from the ladder at
   `forecast.ladder`; without one, the global batches in `batches` run as many
   steps as the real job takes at that batch (`job.epochs` over `job.dataset_size`,
   or `job.steps`; configs/job/), or only their step time is projected.
   With `job.baseline`, its batch is projected on its own devices as the first
   row, and every other row states its speed-up and cost ratio against it.
4. The table is printed with the caution as its caption, and forecast.json is
   written into the verb's output directory with every assumption and source.
"""

import json
import math
from pathlib import Path

import torch
from omegaconf import OmegaConf
from rich.console import Console

from scaledrill.config import rules
from scaledrill.config.validate import validated_job
from scaledrill.errors import ConfigError, is_number, is_whole
from scaledrill.forecast import flops_per_sample, forecast_json, param_bytes, project_rungs, render_forecast, validate
from scaledrill.forecast.model import count_model
from scaledrill.forecast.project import compare_to_baseline, project_baseline
from scaledrill.optim.job import Job


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
    rules.check_forecast_batches(batches)
    return [{"global_batch": b, "steps_to_target": None} for b in batches]


def measure(task_node, samples: int = 4) -> tuple[float, int, str]:
    """Step 1: (training FLOPs per sample, trainable parameter bytes, task name) of the task's model."""
    from scaledrill.tasks.base import build_task

    task = build_task(task_node)
    size = getattr(task.data.train, "size", None) or samples  # streams have no size
    batch = task.data.train.take(torch.arange(min(samples, size)))
    return flops_per_sample(task.model, batch["input"])["train"], param_bytes(task.model), task.name


def _model_inputs(cfg, sources: dict, model: dict) -> tuple[float, float]:
    """Step 1: FLOPs per sample and gradient bytes, each given or measured (`model` gets what was counted)."""
    flops, grad_bytes = cfg.forecast.get("flops_per_sample"), cfg.forecast.get("grad_bytes")
    if flops is not None and grad_bytes is not None:
        sources |= {"flops_per_sample": "given", "grad_bytes": "given"}
        return float(flops), float(grad_bytes)
    node = cfg.forecast.get("model")
    if node is not None:
        counted = count_model(node, cfg.forecast.get("sample_shape"), cfg.forecast.get("sample_dtype"))
        model |= counted | {"target": node["_target_"], "sample_shape": list(cfg.forecast.sample_shape)}
        measured_flops, measured_bytes = counted["train"], counted["grad_bytes"]
        name = f"{node['_target_']} on the meta device"
    else:
        measured_flops, measured_bytes, name = measure(cfg.task)
        name = f"task {name}"
    sources["flops_per_sample"] = "given" if flops is not None else f"counted (forward+backward) on {name}"
    sources["grad_bytes"] = "given" if grad_bytes is not None else f"trainable parameters of {name}"
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


def _job_steps(rungs: list[dict], job: Job) -> str:
    """Step 3 without a ladder: each batch runs the real job's steps at that batch."""
    for rung in rungs:
        rung["steps_to_target"] = job.total_steps(rung["global_batch"])
    if job.steps is not None:
        return f"job.steps={job.steps} at every batch"
    return f"job: {job.epochs:g} epochs of {job.dataset_size} samples, floor(N/B) steps per epoch"


def _baseline(job: Job, rungs: list[dict], from_ladder: bool):
    """Steps of the baseline's batch: its ladder rung, else the job's length at that batch."""
    if from_ladder:
        match = [r["steps_to_target"] for r in rungs if r["global_batch"] == job.baseline_batch]
        if match:
            return match[0]
    return job.total_steps(job.baseline_batch) if job.described else None


def forecast_verb(cfg, run_dir: Path) -> None:
    """Steps 1-4, reading the files first so a bad path fails before the model is built."""
    node, sources, model = cfg.forecast, {}, {}
    cluster = validate(node)
    job = validated_job(cfg.get("job"))
    if node.get("ladder"):
        rungs, sources["steps_to_target"] = ladder_rungs(node.ladder), f"ladder.json of {node.ladder}"
    elif job.described:
        rungs = _batches(cfg)
        sources["steps_to_target"] = _job_steps(rungs, job)
    else:
        rungs, sources["steps_to_target"] = _batches(cfg), "none; step time only (set forecast.ladder or job.*)"
    ratio = _compression(node, sources)
    flops, grad_bytes = _model_inputs(cfg, sources, model)
    rows = project_rungs(cluster, rungs, flops, grad_bytes, ratio)
    baseline = None
    if job.has_baseline:
        steps = _baseline(job, rungs, bool(node.get("ladder")))
        baseline = project_baseline(cluster, job.baseline_batch, job.baseline_devices, steps, flops, grad_bytes, ratio)
        compare_to_baseline(rows, baseline)
    doc = forecast_json(cluster, rows, flops, grad_bytes, ratio, sources, baseline, model or None)
    Console().print(render_forecast(doc))
    out = Path(run_dir) / "forecast.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(doc, indent=1), encoding="utf-8")
    print(out)
