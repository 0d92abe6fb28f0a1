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


def job_of(node) -> Job:
    """The `job` group as a Job; None or a missing group: nothing described. The group must
    have passed config/rules.py (`check_job`)."""
    if node is None:
        return Job()
    base = node.get("baseline") or {}
    epochs = node.get("epochs")
    return Job(node.get("dataset_size"), None if epochs is None else float(epochs), node.get("steps"),
               base.get("batch"), base.get("devices"))


def job_steps(job: Job, layout, tail: str) -> int:
    """The job's optimizer steps at this layout's global batch; a ConfigError when its
    dataset cannot fill one batch or it has no length."""
    B = layout.global_batch
    if job.dataset_size is not None and job.dataset_size < B:
        raise ConfigError("job.dataset_size", f"is smaller than one global batch B={B} ({layout.describe()})",
                          job.dataset_size)  # fmt: skip
    total = job.total_steps(B, tail)
    if total is None:
        raise ConfigError("job.epochs", "the job needs a length: set job.epochs (with job.dataset_size) or job.steps")
    return total


def job_recipe(cfg, layout, job: Job) -> Recipe:
    """The recipe the cluster runs: the same groups resolved on the job's dataset and length
    (checked against that length first: config/validate.py, `validate_job_recipe`)."""
    total = job_steps(job, layout, cfg.train.tail)
    length = "job.steps" if job.steps is not None else "job.epochs"
    return resolve_recipe(cfg, layout, job.dataset_size, cfg.train.tail, steps=total, length=length)
