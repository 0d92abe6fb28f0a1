"""The plan of a batch-size ladder: which layout each rung runs, for how long, to what target.

Why two ways to grow the batch: `grow=workers` keeps the per-worker batch b and
adds workers; `grow=accum` keeps the workers and accumulates more micro-batches.
Both give the same global batch B, and with exact averaging the same gradients,
but not the same run wherever a worker's own computation matters: compression
and error feedback act on each worker's gradient, and BatchNorm statistics and
the noise-scale estimate depend on what one worker sees. Run both when the
recipe uses either.

Everything is checked here, for every rung, before the first rung trains: a bad
ladder fails at once with the dotted key, not halfway through. The `ladder` keys
follow config/rules.py; the rungs they lead to are checked as runs (validate_run),
and what only a rung's computed values or this machine decide is checked here.
"""

import math
import os
from dataclasses import dataclass

from omegaconf import OmegaConf

from scaledrill.config import rules
from scaledrill.config.rules import TRAIN_LOSS
from scaledrill.config.validate import validate_run, validated_layout
from scaledrill.errors import ConfigError
from scaledrill.train.run import PROCS_PER_CORE


@dataclass(frozen=True)
class Rung:
    global_batch: int
    workers: int
    accum: int
    steps: int  # the rung's optimizer steps: sample budget / B, capped by ladder.max_steps
    limit: str = ""  # which setting bound `steps`, said in words

    @property
    def name(self) -> str:
        return f"rung-B{self.global_batch:04d}"


@dataclass(frozen=True)
class Goal:
    metric: str  # an evaluation metric of the task (loss, accuracy) or train_loss
    value: float | None  # None: no target, each rung runs its budget
    reached_when: str  # below | above

    def met(self, value: float) -> bool:
        if self.value is None or not math.isfinite(value):
            return False
        return value <= self.value if self.reached_when == "below" else value >= self.value

    def to_json(self) -> dict:
        return {"metric": self.metric, "value": self.value, "reached_when": self.reached_when}


@dataclass(frozen=True)
class Plan:
    grow: str
    goal: Goal
    check_every: int
    rungs: list[Rung]
    goal_source: str = "ladder.goal"  # where the goal came from, or why there is none


def read_goal(node) -> Goal:
    """A goal node that has passed config/rules.py (`check_goal`) as a Goal."""
    return Goal(node.metric, None if node.value is None else float(node.value), node.reached_when)


def batches_of(cfg) -> list[int]:
    """B0·2^i for i < ladder.rungs, B0 the layout's global batch; or ladder.batches as given."""
    node = cfg.ladder
    if node.get("batches") is not None:
        return sorted(node.batches)
    return [validated_layout(cfg.layout).global_batch * 2**i for i in range(node.rungs)]


def layout_of(cfg, grow: str, batch: int) -> tuple[int, int]:
    """(workers, accum) of the rung at global batch `batch`."""
    L = cfg.layout
    fixed = L.micro_batch * L.accum if grow == "workers" else L.workers * L.micro_batch
    if batch % fixed:
        what = "layout.micro_batch·layout.accum" if grow == "workers" else "layout.workers·layout.micro_batch"
        raise ConfigError("ladder.batches", f"every batch must be a multiple of {what}={fixed} with ladder.grow={grow}", batch)
    return (batch // fixed, L.accum) if grow == "workers" else (L.workers, batch // fixed)


def steps_of(cfg, batch: int) -> tuple[int, str]:
    """(steps of the rung at `batch`, which setting bound them): the sample budget // B, capped."""
    max_steps = cfg.ladder.get("max_steps")
    cap, cap_key = (max_steps, "ladder.max_steps") if max_steps else (cfg.train.steps, "train.steps")
    budget = cfg.ladder.get("max_samples")
    if budget is None:
        return cap, f"{cap_key}={cap} (no sample budget)"
    if budget < batch:
        raise ConfigError("ladder.max_samples", f"the sample budget is smaller than one global batch of rung B={batch}", budget)
    if budget // batch <= cap:
        return budget // batch, f"sample budget ladder.max_samples={budget} // B"
    return cap, f"{cap_key}={cap} caps the sample budget ({budget} // B = {budget // batch} steps)"


def goal_of(cfg) -> tuple[Goal, str]:
    """The ladder's goal and where it came from: ladder.goal when it has a value,
    else the task's declared goal (`task.goal`: metric, value, reached_when), else none, with why."""
    goal = read_goal(cfg.ladder.goal)
    if goal.value is not None:
        return goal, "ladder.goal"
    declared = cfg.task.get("goal")
    name = cfg.task.get("name", "custom")
    if declared is None or declared.get("value") is None:
        return goal, (
            f"no goal: ladder.goal.value is null and task {name} declares no task.goal, so every rung runs its "
            "whole budget and steps-to-goal cannot be fitted; set ladder.goal.value (or task.goal)"
        )
    node = OmegaConf.create({k: declared.get(k) for k in ("metric", "value", "reached_when")})
    rules.check_goal(node, "task.goal")
    return read_goal(node), f"ladder.goal not set: using task {name}'s goal (task.goal)"


def rung_config(cfg, rung: Rung, lr: float | None = None, warmup: int | None = None, local: bool = False):
    """The run config of one rung; `lr` replaces the scaling rule's peak rate, `local`
    runs the same W, b, k in one process (layout invariance makes it the same run)."""
    out = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    out.pop("ladder", None)
    out.layout.workers, out.layout.accum, out.train.steps = rung.workers, rung.accum, rung.steps
    if lr is not None:
        out.scaling.rule, out.scaling.base_lr, out.scaling.base_batch, out.optim.lr = "none", float(lr), None, float(lr)
    if warmup is not None:
        out.schedule.warmup_steps, out.schedule.warmup_epochs = int(warmup), None
    if local:
        out.layout.procs, out.layout.backend = 1, "local"
    return out


def plan_ladder(cfg) -> Plan:
    """Check the ladder and every rung's run config; raise ConfigError naming the key."""
    node = cfg.ladder
    rules.check_ladder(cfg)
    goal, source = goal_of(cfg)
    check_every, parallel = node.check_every, node.parallel
    if parallel > (os.cpu_count() or 1):
        raise ConfigError("ladder.parallel", f"must be at most the {os.cpu_count()} cores of this machine", parallel)
    procs = parallel * cfg.layout.procs  # rungs side by side, each with its own processes
    if procs > PROCS_PER_CORE * (os.cpu_count() or 1):
        raise ConfigError("ladder.parallel", f"{parallel} rungs of layout.procs={cfg.layout.procs} processes start {procs} "
                          f"processes; at most {PROCS_PER_CORE * (os.cpu_count() or 1)} on these {os.cpu_count()} cores", parallel)
    rungs = []
    for batch in batches_of(cfg):
        workers, accum = layout_of(cfg, node.grow, batch)
        rung = Rung(batch, workers, accum, *steps_of(cfg, batch))
        try:
            validate_run(rung_config(cfg, rung))
        except ConfigError as err:
            rule = f"{err.rule} — at rung B={batch}, where grow={node.grow} gives W={workers}, k={accum}, {rung.steps} steps"
            raise ConfigError(err.key, rule, err.value) from None
        rungs.append(rung)
    return Plan(node.grow, goal, check_every, rungs, source)


@dataclass
class Watch:
    """Follows one run toward the target; as the engine's on_step callback it says when to stop.

    Checks the target every `check_every` steps and at the last step. Stops at once
    when the training loss is not finite or exceeds `explode` times its first value
    (a diverging run gains nothing from more steps). `report(step, value)` sees every
    checked value and may return True to stop the run (a pruner's verdict).
    """

    goal: Goal
    check_every: int
    explode: float | None = None
    report: object = None
    reached_step: int | None = None
    metric: float | None = None
    diverged: str | None = None
    stopped_by_report: bool = False
    first_loss: float | None = None

    def __call__(self, trainer, record) -> bool:
        step, loss = trainer.step_index, record.loss
        self.first_loss = loss if self.first_loss is None else self.first_loss
        if not math.isfinite(loss):
            self.diverged = f"training loss {loss} at step {step}"
        elif self.explode and loss > self.explode * abs(self.first_loss):
            self.diverged = f"training loss {loss:.4g} at step {step} exceeds {self.explode:g}× its first value {self.first_loss:.4g}"
        if self.diverged:
            return True
        if step % self.check_every and step != trainer.cfg.train.steps:
            return False
        self.metric = loss if self.goal.metric == TRAIN_LOSS else self._evaluate(trainer)
        if not math.isfinite(self.metric):
            self.diverged = f"{self.goal.metric} is {self.metric} at step {step}"
            return True
        if self.goal.met(self.metric):
            self.reached_step = step
            return True
        if self.report is not None and self.report(step, self.metric):
            self.stopped_by_report = True
            return True
        return False

    def _evaluate(self, trainer) -> float:
        metrics = trainer.evaluate()
        if self.goal.metric not in metrics:
            known = ", ".join([*metrics, TRAIN_LOSS])
            raise ConfigError("ladder.goal.metric", f"the task {trainer.task.name} reports {known}", self.goal.metric)
        return metrics[self.goal.metric]
