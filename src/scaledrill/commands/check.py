"""`scaledrill check`: does every way of computing the large batch give the true large batch?

1. validate the recipe and the `check:` node, and plan the paths: which can serve
   check.batchnorm (batchnorm.py), which run here (ConfigError, exit 2, names the key);
2. compute the float64 reference trajectory of the true batch (reference.py), and
   where the paths compute in float32 the same in float32, whose distance from float64
   is the least tolerance (the rounding floor, tolerance.py);
3. run each path (runner.py) from the same parameters on the same global batches;
4. compare the first step's averaged gradient per layer and the N-step parameter
   trajectory with rounding-derived tolerances (tolerance.py);
5. when a path differs, rerun targeted variants to name the cause (diagnose.py);
6. print the tables and verdict, write RUN_DIR/check.json; exit 0 match, 1 mismatch.
"""

from dataclasses import dataclass, field
from pathlib import Path

import torch
from omegaconf import OmegaConf
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from scaledrill.check import output
from scaledrill.check.diagnose import diagnose
from scaledrill.check.runner import Runner
from scaledrill.check.settings import read_settings
from scaledrill.check.tolerance import UNIT_ROUNDOFF, Tolerance, compare, floor_from, floor_note, same_trajectory
from scaledrill.config.validate import validate_run


@dataclass
class CheckResult:
    exit_code: int
    report: dict = field(default_factory=dict)


def check_verb(cfg, run_dir: Path) -> CheckResult:
    cfg = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    layout = validate_run(cfg)  # 1.
    settings = read_settings(cfg)
    runner = Runner(cfg, settings, run_dir)
    plan, skipped = runner.plan()
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    (run_dir / "config.yaml").write_text(OmegaConf.to_yaml(cfg))
    tol = Tolerance.for_run(cfg, settings.tolerance_scale)
    reference = {"dtype": "float64", "why": ""}
    if runner.ref_dtype == torch.float32:  # both sides round in float32: their errors add
        tol = Tolerance(tol.unit + UNIT_ROUNDOFF["float32"], tol.batch, tol.scale)
        reference = {"dtype": "float32", "why": runner.ref_why, "unit_roundoff": tol.unit}
    print(f"{layout.describe()}; reference: {reference['dtype']} true batch, BatchNorm statistics "
          f"{'per worker micro-batch' if settings.batchnorm == 'worker' else 'over the whole global batch'}"
          f"{'; paths train with train.batchnorm=global' if runner.batchnorm == 'global' else ''}")
    if reference["why"]:
        print(f"reference in float32: {reference['why']}; tolerance u = 2^-24 of the path plus 2^-24 of the reference")
    if runner.model_note:
        kept = not cfg.train.convert_batchnorm
        print(runner.model_note + ("; BatchNorm in the reference only (train.convert_batchnorm=false keeps the paths' stock BatchNorm)" if kept else ""))

    coarser = runner.rounds_coarser()
    with Progress(TextColumn("[bold]check[/] {task.description}"), BarColumn(), MofNCompleteColumn(),
                  TimeElapsedColumn(), console=Console(stderr=True), transient=True) as bar:
        work = bar.add_task("reference", total=1 + coarser + len(plan))  # the floor: two float32 runs, one tick
        ref = runner.reference()  # 2.
        bar.advance(work)
        if coarser:  # the model's own float32 rounding sets the least tolerance (tolerance.py)
            bar.update(work, description="reference in float32 (rounding floor)")
            low = runner.reference(dtype=torch.float32)
            moved = runner.reference(dtype=torch.float32, model_hook=lambda model: torch.rand(7))  # only the random state moves
            if same_trajectory(low, moved):  # else unkeyed random draws, not rounding: no floor (the diagnosis names them)
                tol = floor_from(tol, low, ref)
            bar.advance(work)
        runs = {}
        for name in plan:  # 3.
            bar.update(work, description=name)
            runs[name] = runner.run(name)
            bar.advance(work)
        results = [compare(name, traj, ref, tol) for name, traj in runs.items()]  # 4.
        failing = [r for r in results if not r.ok]
        findings = []
        if failing:  # 5.
            bar.update(work, description="naming the cause (reruns of the paths that differ)")
            findings = diagnose(runner, ref, tol, failing, runs)
    if coarser and (note := floor_note(tol, ref)):
        print(note)
        reference["floor"] = note
    output.show(results, skipped, findings)  # 6.
    report = output.save(run_dir, results, skipped, findings, reference)
    return CheckResult(0 if not failing else 1, report)
