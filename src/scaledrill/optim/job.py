"""The real job: the run on the cluster that the rehearsal stands in for.

Why: the rehearsal trains a small task, but the recipe that matters is the one
the cluster will run — on its own dataset, for its own number of epochs, moved
from its own baseline (a batch on a number of devices). The `job` config group
(configs/job/) describes it independently of the rehearsal task:

- `dataset_size`: training samples of the real dataset (null: not described);
- `epochs` or `steps`: the run length (set one);
- `baseline.batch`, `baseline.devices`: the recipe the job is moved from.

`scaledrill recipe` resolves the same optim/scaling/schedule groups on these
numbers (`job_recipe`), and `scaledrill forecast` takes the job's length and its
baseline row from here.
"""

import math
from dataclasses import asdict, dataclass

from scaledrill.errors import ConfigError
from scaledrill.optim.recipe import Recipe, resolve_recipe


@dataclass(frozen=True)
class Job:
    dataset_size: int | None = None
    epochs: float | None = None
    steps: int | None = None
    baseline_batch: int | None = None
    baseline_devices: int | None = None

    @property
    def described(self) -> bool:
        """True when the job's length can be worked out (a dataset and epochs, or steps)."""
        return self.steps is not None or (self.dataset_size is not None and self.epochs is not None)

    @property
    def has_baseline(self) -> bool:
        return self.baseline_batch is not None

    def steps_per_epoch(self, global_batch: int, tail: str = "drop") -> float | None:
        if self.dataset_size is None:
            return None
        return self.dataset_size // global_batch if tail == "drop" else self.dataset_size / global_batch

    def total_steps(self, global_batch: int, tail: str = "drop") -> int | None:
        """Optimizer steps of the job at global batch B: `steps`, else ⌈epochs · steps per epoch⌉."""
        if self.steps is not None:
            return self.steps
        per_epoch = self.steps_per_epoch(global_batch, tail)
        if per_epoch is None or self.epochs is None:
            return None
        if per_epoch < 1:
            raise ConfigError(
                "job.dataset_size", f"is smaller than one global batch B={global_batch}; no epoch fits a step",
                self.dataset_size,
            )
        return math.ceil(self.epochs * per_epoch)

    def to_json(self) -> dict:
        return asdict(self)


def _whole(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value >= 1


def job_of(node) -> Job:
    """The `job` group as a Job; a ConfigError names the first bad key. None or a missing group: nothing described."""
    if node is None:
        return Job()
    known = {"dataset_size", "epochs", "steps", "baseline"}
    unknown = sorted(set(node) - known)
    if unknown:
        raise ConfigError(f"job.{unknown[0]}", f"is not a job setting (known: {', '.join(sorted(known))})")
    size, epochs, steps = node.get("dataset_size"), node.get("epochs"), node.get("steps")
    base = node.get("baseline") or {}
    batch, devices = base.get("batch"), base.get("devices")
    for key, value in (("dataset_size", size), ("steps", steps), ("baseline.batch", batch), ("baseline.devices", devices)):
        if value is not None and not _whole(value):
            raise ConfigError(f"job.{key}", "must be null or a whole number >= 1", value)
    if epochs is not None and not (isinstance(epochs, (int, float)) and not isinstance(epochs, bool) and epochs > 0):
        raise ConfigError("job.epochs", "must be null or a number of passes > 0", epochs)
    if epochs is not None and steps is not None:
        raise ConfigError("job.steps", "set job.epochs or job.steps, not both", steps)
    if size is not None and epochs is None and steps is None:
        raise ConfigError("job.epochs", "the real job needs a length with job.dataset_size: set job.epochs or job.steps")
    if epochs is not None and size is None:
        raise ConfigError("job.dataset_size", "is needed to turn job.epochs into steps", None)
    if devices is not None and batch is None:
        raise ConfigError("job.baseline.batch", "is needed with job.baseline.devices", None)
    if batch is not None and devices is None:
        raise ConfigError("job.baseline.devices", "is needed with job.baseline.batch", None)
    return Job(size, None if epochs is None else float(epochs), steps, batch, devices)


def job_recipe(cfg, layout, job: Job) -> Recipe:
    """The recipe the cluster runs: the same groups resolved on the job's dataset and length."""
    B = layout.global_batch
    if job.dataset_size is not None and job.dataset_size < B:
        raise ConfigError("job.dataset_size", f"is smaller than one global batch B={B} ({layout.describe()})",
                          job.dataset_size)  # fmt: skip
    total = job.total_steps(B, cfg.train.tail)
    if total is None:
        raise ConfigError("job.epochs", "the job needs a length: set job.epochs (with job.dataset_size) or job.steps")
    length = "job.steps" if job.steps is not None else "job.epochs"
    return resolve_recipe(cfg, layout, job.dataset_size, cfg.train.tail, steps=total, length=length)
