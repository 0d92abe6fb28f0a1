"""Which paths a check runs, and how to run any of them again as a variant.

Path names: `accumulation`, `workers:fused|vmap|loop`, `processes:gloo|mpi`, and
for a user's own step `step:accumulation` (one thread-worker, W·k micro-batches)
and `step:workers` (W thread-workers). The diagnosis reruns paths with a changed
model (dropout off) or config (float64) through `run`. Every engine path trains with
the BatchNorm statistics the check compares (batchnorm.py).
"""

from pathlib import Path

import torch

from scaledrill.check.batchnorm import has_batchnorm, path_batchnorm, unserved
from scaledrill.check.paths import GRAD_PATHS, accumulation, variant, virtual
from scaledrill.check.processes import available, process_count, run_processes
from scaledrill.check.reference import model_dtype, reference
from scaledrill.check.threads import load_step, run_step_function
from scaledrill.check.trajectory import Trajectory
from scaledrill.errors import ConfigError


class Runner:
    def __init__(self, cfg, settings, run_dir: Path):
        self.cfg, self.settings, self.run_dir = cfg, settings, Path(run_dir)
        self.step_fn = load_step(settings.step) if settings.step is not None else None
        self.probes: dict = {}  # path name -> Probe of a user's step
        self.variants = 0
        self.batchnorm = path_batchnorm(cfg, settings, has_batchnorm(cfg))  # train.batchnorm of every engine path
        self.ref_dtype, self.ref_why, self.model_note = model_dtype(cfg)  # float64 unless the model fixes its own dtype

    def plan(self) -> tuple[list[str], dict[str, str]]:
        """(paths to run, {skipped path: why}); ConfigError when nothing is left to compare."""
        run, skipped = self._wanted()
        if self.batchnorm == "global":
            for name in list(run):
                why = unserved(self.cfg, name)
                if why is not None:
                    run.remove(name)
                    skipped[name] = why
        if not run:  # a check of no path would claim a match it never tested
            key = "check.batchnorm" if self.batchnorm == "global" else "check.paths"
            reasons = "; ".join(f"{name}: {why}" for name, why in skipped.items())
            raise ConfigError(key, f"none of the requested paths can be compared with the reference ({reasons})")
        return run, skipped

    def _wanted(self) -> tuple[list[str], dict[str, str]]:
        """The paths check.paths asks for that this layout and machine can run, and why the others cannot."""
        s, run, skipped = self.settings, [], {}
        wanted_grads = [g for g in GRAD_PATHS if g in s.paths]
        if self.step_fn is not None:
            run += ["step:accumulation"] if "accumulation" in s.paths else []
            run += ["step:workers"] if wanted_grads else []
            if "processes" in s.paths:
                self._processes("step:processes", run, skipped)
            return run, skipped
        run += ["accumulation"] if "accumulation" in s.paths else []
        for g in wanted_grads:
            if g == "fused" and self.cfg.sync.bitwise:
                skipped["workers:fused"] = "sync.bitwise needs each worker's gradient; fused gives a process sum"
            else:
                run.append(f"workers:{g}")
        if "processes" in s.paths:
            self._processes("processes", run, skipped)
        return run, skipped

    def _processes(self, prefix: str, run: list, skipped: dict) -> None:
        """`prefix:backend` for every backend of check.backends this layout and machine can run."""
        for backend in self.settings.backends:
            name = f"{prefix}:{backend}"
            if process_count(self.cfg) is None:
                skipped[name] = "one worker cannot be split over processes"
            elif not available(backend, self.cfg.layout.get("mpiexec")):
                skipped[name] = f"{backend} is not available here"
            else:
                run.append(name)

    def reference(self, batchnorm: str | None = None, model_hook=None, dtype=None) -> Trajectory:
        return reference(self.cfg, self.settings.steps, batchnorm or self.settings.batchnorm, model_hook, dtype or self.ref_dtype)

    def rounds_coarser(self) -> bool:
        """Whether the paths compute in float32 while the reference is float64 (the case of the rounding floor)."""
        train = self.cfg.train
        return self.ref_dtype == torch.float64 and train.dtype == "float32" and train.precision == "fp32"

    def run(self, name: str, cfg=None, model_hook=None) -> Trajectory:
        given, steps = cfg or self.cfg, self.settings.steps
        cfg = variant(given, **{"train.batchnorm": self.batchnorm})
        kind, _, detail = name.partition(":")
        if kind == "accumulation":
            return accumulation(cfg, steps, model_hook=model_hook)
        if kind == "workers":
            return virtual(cfg, detail, steps, model_hook=model_hook)
        if kind == "processes":
            self.variants += 1
            where = self.run_dir if given is self.cfg else self.run_dir / f"variant-{self.variants}"
            return run_processes(cfg, detail, steps, where)
        if kind == "step" and detail.startswith("processes:"):
            self.variants += 1
            where = self.run_dir if given is self.cfg else self.run_dir / f"variant-{self.variants}"
            return run_processes(cfg, detail.partition(":")[2], steps, where, step_node=self.settings.step)
        if kind == "step":
            L = cfg.layout
            laid = cfg if detail == "workers" else variant(cfg, **{"layout.workers": 1, "layout.accum": L.workers * L.accum})
            out, probe = run_step_function(laid, self.step_fn, steps, model_hook=model_hook, timeout_s=cfg.train.timeout_s)
            self.probes.setdefault(name, probe)
            return out
        raise ValueError(f"unknown path {name!r}")
