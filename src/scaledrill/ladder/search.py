"""The learning-rate window of one rung, by a budgeted search (successive halving or Hyperband).

Why: the rate a scaling rule hands a rung is a guess; the rates that actually
reach the target at that batch form a window that narrows as the batch grows,
and what it costs to find it is part of what a larger batch costs. Trials are
cheap to stop: most bad rates look bad after a few checks.

Steps:
1. sample lr log-uniformly in [lr·lo, lr·hi] around the rung's rate (and, with
   `warmup_max` > 0, warmup steps in [0, warmup_max]) with Optuna's TPE sampler,
   seeded, trials one after another, so the search is reproducible;
2. train the trial at the rung's W, b, k in this process (layout invariance:
   the same run as on P processes), checking the target metric every
   `ladder.check_every` steps and reporting it to the pruner;
3. stop a trial at once when its loss is not finite or exceeds `explode` times
   its first value (counted as diverged), when the pruner says so (Optuna's
   `SuccessiveHalvingPruner` or `HyperbandPruner`, reduction factor η), or at
   the target;
4. the window spans the rates that reached the target; the best rate reached it
   in the fewest steps (without a hit: the best final metric).

Beyond one process: the trials live in Optuna's own storage (`ladder.search.storage`:
null keeps them in memory; a file path is a journal file, `JournalFileBackend`, on
a disk every process can reach; a URL such as sqlite:///… or postgresql://… a
database). Every `scaledrill ladder` pointed at the same storage and study name
(`ladder.search.study`, one study per rung: NAME-B<batch>) draws its trials from
the one study, and the pruner compares against every process's trials. Each trial
keeps its record (reached, diverged, steps, metric, which process) as a user
attribute, so any process can rebuild the whole search. The trial count is the
study's: a process stops when the study holds `trials` trials; two processes that
start a trial at the same moment can overshoot it by one each. A shared search is
not reproducible trial for trial (each process seeds its sampler with seed + its
process id, so two processes never draw the same rates).

References: Jamieson & Talwalkar 2016 (successive halving); Li et al. 2018 (Hyperband).
"""

import math
import os
import socket
from dataclasses import asdict, dataclass, field
from pathlib import Path

import optuna
from optuna.storages import JournalStorage
from optuna.storages.journal import JournalFileBackend

from scaledrill.config.rules import PRUNERS, check_search
from scaledrill.dist import LocalCollective
from scaledrill.errors import ConfigError
from scaledrill.ladder.rungs import Plan, Rung, Watch, rung_config


@dataclass
class Trial:
    lr: float
    reached: bool = False
    diverged: bool = False
    pruned: bool = False
    steps: int = 0
    metric: float | None = None
    warmup: int | None = None
    worker: str | None = None  # host:pid of the process that ran it (a shared search has several)


@dataclass
class SearchResult:
    global_batch: int
    trials: list[Trial] = field(default_factory=list)

    @property
    def samples_spent(self) -> int:
        return sum(t.steps for t in self.trials) * self.global_batch

    def window(self) -> list[float] | None:
        hit = [t.lr for t in self.trials if t.reached]
        return [min(hit), max(hit)] if hit else None

    def best(self, mode: str) -> Trial | None:
        hit = [t for t in self.trials if t.reached]
        if hit:
            return min(hit, key=lambda t: (t.steps, t.metric if mode == "below" else -t.metric))
        sign = 1.0 if mode == "below" else -1.0
        done = [t for t in self.trials if not t.diverged and t.metric is not None and math.isfinite(t.metric)]
        return min(done, key=lambda t: sign * t.metric) if done else None

    def to_json(self, mode: str = "below") -> dict:
        best = self.best(mode)
        return {
            "best_lr": None if best is None else best.lr,
            "window": self.window(),
            "trials": [asdict(t) for t in self.trials],
            "pruned": sum(t.pruned for t in self.trials),
            "diverged": sum(t.diverged for t in self.trials),
            "samples_spent": self.samples_spent,
        }


@dataclass(frozen=True)
class SearchSettings:
    trials: int
    pruner: str
    reduction: int
    min_steps: int
    lo: float
    hi: float
    warmup_max: int
    explode: float | None
    seed: int
    storage: str | None = None
    study: str = "ladder"

    @classmethod
    def from_config(cls, node, check_every: int) -> "SearchSettings":
        check_search(node)  # config/rules.py
        storage = node.get("storage")
        if storage and "://" not in storage and not Path(storage).expanduser().parent.is_dir():
            raise ConfigError("ladder.search.storage", "is a journal file whose directory must exist "
                              "(on a disk every process of the search can reach)", storage)  # fmt: skip
        return cls(
            trials=node.trials, pruner=node.pruner, reduction=node.reduction, min_steps=node.get("min_steps") or check_every,
            lo=float(node.lo), hi=float(node.hi), warmup_max=node.warmup_max, explode=node.get("explode"), seed=node.seed,
            storage=storage, study=node.get("study", "ladder").strip(),
        )

    def open_storage(self):
        """None (Optuna keeps the study in memory), a database URL as given, or a journal file."""
        if self.storage is None or "://" in self.storage:
            return self.storage
        return JournalStorage(JournalFileBackend(str(Path(self.storage).expanduser())))

    def pruner_for(self, steps: int) -> optuna.pruners.BasePruner:
        if self.pruner == "halving":
            return optuna.pruners.SuccessiveHalvingPruner(min_resource=self.min_steps, reduction_factor=self.reduction)
        return optuna.pruners.HyperbandPruner(min_resource=self.min_steps, max_resource=steps, reduction_factor=self.reduction)


def search_lr(cfg, plan: Plan, rung: Rung, lr: float, settings: SearchSettings | None = None) -> SearchResult:
    """Search the lr window of `rung` around its rate `lr`; see the module docstring."""
    from scaledrill.train.engine import run_training

    settings = settings or SearchSettings.from_config(cfg.ladder.search, plan.check_every)
    result = SearchResult(rung.global_batch)

    def objective(trial: optuna.Trial) -> float:
        rate = trial.suggest_float("lr", lr * settings.lo, lr * settings.hi, log=True)
        warmup = trial.suggest_int("warmup", 0, min(settings.warmup_max, rung.steps)) if settings.warmup_max else None
        record = Trial(lr=rate, warmup=warmup, worker=f"{socket.gethostname()}:{os.getpid()}")

        def report(step: int, value: float) -> bool:
            trial.report(value, step)
            return trial.should_prune()

        watch = Watch(plan.goal, plan.check_every, explode=settings.explode, report=report)
        summary = run_training(rung_config(cfg, rung, lr=rate, warmup=warmup, local=True), LocalCollective(), on_step=watch)
        record.steps, record.metric = summary["steps"], watch.metric
        record.reached = watch.reached_step is not None
        record.diverged = bool(watch.diverged or summary["diverged"])
        record.pruned = watch.stopped_by_report and not record.diverged
        trial.set_user_attr("record", asdict(record))
        if record.diverged or record.pruned:
            raise optuna.TrialPruned()
        return watch.metric

    optuna.logging.set_verbosity(optuna.logging.WARNING)
    shared = settings.storage is not None
    study = optuna.create_study(
        storage=settings.open_storage(),
        study_name=f"{settings.study}-B{rung.global_batch}",
        load_if_exists=True,
        direction="minimize" if plan.goal.reached_when == "below" else "maximize",
        sampler=optuna.samplers.TPESampler(seed=settings.seed + (os.getpid() if shared else 0)),
        pruner=settings.pruner_for(rung.steps),
    )
    if _started(study) < settings.trials:  # a study another process already finished gets no more trials
        stop = optuna.study.MaxTrialsCallback(settings.trials, states=None)  # counts running trials of every process
        study.optimize(objective, n_trials=settings.trials, catch=(), callbacks=[stop])
    result.trials = [Trial(**t.user_attrs["record"]) for t in _done(study)]
    return result


def _done(study: optuna.Study) -> list:
    """The study's finished trials with their records, in trial order (every process's)."""
    states = (optuna.trial.TrialState.COMPLETE, optuna.trial.TrialState.PRUNED)
    return sorted((t for t in study.get_trials(deepcopy=False, states=states) if "record" in t.user_attrs),
                  key=lambda t: t.number)  # fmt: skip


def _started(study: optuna.Study) -> int:
    return len(study.get_trials(deepcopy=False))
