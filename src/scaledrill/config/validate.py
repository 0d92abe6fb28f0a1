"""Check a whole configuration before any process starts.

The rules live in config/rules.py; this module applies them in order, group by group,
and hands back what the checked groups describe (the layout, the real job). The parts
(layout, optim, sync, telemetry, tasks) keep no copy of a rule: whoever builds them from
a configuration runs these checks first (`scaledrill run` and every verb through
`validate_run`, a Trainer built by library code on its own).
"""

from scaledrill.config import rules
from scaledrill.layout import Layout
from scaledrill.optim.job import Job, job_of, job_steps


def validated_layout(node) -> Layout:
    """The `layout` group as a Layout, after its rules."""
    rules.check_layout(node)
    return Layout.from_config(node)


def validate_train(cfg) -> None:
    """The `train` group's own keys (the rules that also read the sync run in `validate_run`)."""
    rules.check_train(cfg.train)


def validate_run(cfg) -> Layout:
    """Raise ConfigError naming the first bad key; return the layout when all is well."""
    layout = validated_layout(cfg.layout)
    rules.check_train(cfg.train)
    rules.check_recipe(cfg)
    rules.check_sync(cfg.sync)
    rules.check_batchnorm_path(cfg)  # after sync: which gradient path the sync needs
    rules.check_grad_path(cfg)  # fused cannot serve a sync that needs per-worker rows
    rules.check_telemetry(cfg.telemetry)
    return layout


def validated_job(node) -> Job:
    """The `job` group as a Job, after its rules; None or a missing group: nothing described."""
    rules.check_job(node)
    return job_of(node)


def validate_job_recipe(cfg, layout: Layout, job: Job) -> None:
    """The optim, scaling and schedule groups against the real job's length (before `job_recipe`)."""
    rules.check_recipe(cfg, job_steps(job, layout, cfg.train.tail))
