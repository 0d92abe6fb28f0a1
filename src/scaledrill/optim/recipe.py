"""The resolved recipe: what a run at this layout will actually use, before it trains.

`resolve_recipe` turns the `optim`, `scaling` and `schedule` groups plus the layout
into numbers: global batch B = W·b·k, peak lr from the scaling rule, warmup and
run length in steps and epochs. `scaledrill recipe` prints it with `render_recipe`;
the engine asks it for the rate of every step with `lr_at`.

Steps per epoch are N // B when the tail is dropped and N / B when it is carried
into the next epoch (train.tail); None for an endless stream, which has no epochs.
"""

from dataclasses import asdict, dataclass

from rich.table import Table

from scaledrill.errors import DataError
from scaledrill.optim.build import decay_of
from scaledrill.optim.groups import describe_exclusions
from scaledrill.optim.scaling import scaled_lr
from scaledrill.optim.schedules import Schedule, build_schedule, check_warmup, horizon_of

FORMULAS = {
    "none": "lr = base_lr",
    "linear": "lr = base_lr · B / base_batch  (Goyal et al. 2017)",
    "sqrt": "lr = base_lr · √(B / base_batch)  (Krizhevsky 2014; Hoffer et al. 2017)",
    "power": "lr = base_lr · (B / base_batch)^exponent",
}


@dataclass(frozen=True)
class Recipe:
    global_batch: int
    peak_lr: float
    warmup_steps: int
    steps_per_epoch: float | None
    total_steps: int
    rule: str
    base_lr: float
    base_batch: int | None
    exponent: float | None
    optimizer: str
    weight_decay: float
    decay: str
    clip_norm: float | None
    exclusions: str
    schedule: Schedule
    layout: str

    def lr_at(self, step: int) -> float:
        """The learning rate of optimizer step `step` (from 0)."""
        return self.peak_lr * self.schedule.factor(step)

    @property
    def epochs(self) -> float | None:
        """Passes over the training set in `total_steps` steps; None for a stream."""
        return self.total_steps / self.steps_per_epoch if self.steps_per_epoch else None

    def milestones(self) -> list[int]:
        """Steps worth showing: start, mid-warmup, end of warmup, each decay milestone, middle, last."""
        w, n = self.warmup_steps, self.total_steps
        steps = {0, w // 2, w, n // 2, n - 1, *self.schedule.milestones}
        return sorted(s for s in steps if 0 <= s < n)

    def to_json(self) -> dict:
        out = asdict(self)
        out["schedule"]["milestones"] = list(self.schedule.milestones)
        out["epochs"] = self.epochs
        out["lr_at"] = [{"step": s, "lr": self.lr_at(s)} for s in self.milestones()]
        return out


def resolve_recipe(
    cfg, layout, dataset_size: int | None, tail: str, steps: int | None = None, length: str = "train.steps"
) -> Recipe:
    """The recipe of `cfg` at `layout` on a training set of `dataset_size` samples (None: a stream).

    `steps`: the run length when it is not the rehearsal's `train.steps` (the real job's,
    named `length` in errors); the schedule then spans exactly those steps. The groups
    must have passed config/rules.py (`check_recipe`, with `steps` as the horizon).
    """
    B = layout.global_batch
    total = cfg.train.steps if steps is None else steps
    horizon = horizon_of(cfg.schedule, total) if steps is None else steps
    if dataset_size is not None and dataset_size < B:
        raise DataError(f"the training set has {dataset_size} samples, fewer than one global batch B={B}")
    per_epoch = None if dataset_size is None else (dataset_size // B if tail == "drop" else dataset_size / B)
    schedule = build_schedule(cfg.schedule, horizon, per_epoch)
    if cfg.schedule.get("warmup_epochs") is not None:
        check_warmup(schedule.warmup_steps, horizon, "schedule.warmup_epochs", cfg.schedule.warmup_epochs, length)
    s, o = cfg.scaling, cfg.optim
    base_batch = None if s.rule == "none" else s.base_batch
    exponent = s.exponent if s.rule == "power" else None
    return Recipe(
        global_batch=B,
        peak_lr=scaled_lr(s.rule, s.base_lr, base_batch, B, exponent),
        warmup_steps=schedule.warmup_steps,
        steps_per_epoch=per_epoch,
        total_steps=total,
        rule=s.rule,
        base_lr=float(s.base_lr),
        base_batch=base_batch,
        exponent=exponent,
        optimizer=o.name,
        weight_decay=float(o.weight_decay),
        decay=decay_of(o),
        clip_norm=o.clip_norm,
        exclusions=describe_exclusions(o.exclude),
        schedule=schedule,
        layout=layout.describe(),
    )


def _epoch_note(r: Recipe, steps: int) -> str:
    return f" (epoch {steps / r.steps_per_epoch:.3g})" if r.steps_per_epoch else ""


def _rows(r: Recipe) -> list[tuple[str, str]]:
    """(quantity, value) pairs that every recipe has, in the order they are printed."""
    per_epoch = "stream (no epochs)" if r.steps_per_epoch is None else f"{r.steps_per_epoch:g}"
    epochs = f" ({r.epochs:.3g} epochs)" if r.epochs else ""
    warm_epochs = f" ({r.warmup_steps / r.steps_per_epoch:.3g} epochs)" if r.steps_per_epoch else ""
    base = f"{r.base_lr:g}" + ("" if r.base_batch is None else f" at batch {r.base_batch}")
    rule = r.rule + (f", exponent {r.exponent:g}" if r.exponent is not None else "")
    decays = ", ".join(f"{m}{_epoch_note(r, m)}" for m in r.schedule.milestones) or "-"
    rows = [
        ("layout", r.layout),
        ("global batch B", str(r.global_batch)),
        ("scaling rule", f"{rule}: {FORMULAS[r.rule]}"),
        ("base lr", base),
        ("peak lr", f"{r.peak_lr:.6g}"),
        ("optimizer", f"{r.optimizer}, weight decay {r.weight_decay:g} ({r.decay})"),
        ("clip norm", "off" if r.clip_norm is None else f"{r.clip_norm:g}"),
        ("no decay, no trust ratio", r.exclusions),
        ("schedule", f"{r.schedule.shape}, warmup from {r.schedule.warmup_start:g}·peak"),
        ("warmup steps", f"{r.warmup_steps}{warm_epochs}"),
        ("steps per epoch", per_epoch),
        ("total steps", f"{r.total_steps}{epochs}"),
        ("decay points (step)", decays),
    ]
    if r.schedule.total_steps != r.total_steps:
        rows.append(("schedule horizon", f"{r.schedule.total_steps} steps (schedule.total_steps)"))
    return rows


def render_recipe(recipe: Recipe | dict[str, Recipe]) -> Table:
    """A table of one recipe, ending with the rate at a few milestones; or of several
    recipes side by side (e.g. {"rehearsal": ..., "real job": ...}), one column each."""
    if isinstance(recipe, Recipe):
        table = Table(title="recipe", show_header=False)
        table.add_column("quantity", style="bold")
        table.add_column("value")
        rows = _rows(recipe) + [(f"lr at step {s}", f"{recipe.lr_at(s):.6g}") for s in recipe.milestones()]
        for row in rows:
            table.add_row(*row)
        return table
    table = Table(title="recipe")
    table.add_column("quantity", style="bold")
    for label in recipe:
        table.add_column(label)
    columns = [dict(_rows(r)) for r in recipe.values()]
    names = list(dict.fromkeys(name for column in columns for name in column))
    for name in names:
        table.add_row(name, *(column.get(name, "-") for column in columns))
    table.add_row("lr at", *("\n".join(f"step {s}: {r.lr_at(s):.6g}" for s in r.milestones()) for r in recipe.values()))
    return table

