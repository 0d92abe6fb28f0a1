"""The engine's ways of computing one large batch, each run as the engine runs it.

- accumulation: one worker taking the global batch as W·k micro-batches of b
  (layout workers=1, accum=W·k): the same B, so the sampler gives the same samples;
- virtual workers: W workers in one process through `scaledrill.train.engine.Trainer`,
  once per gradient path (fused, vmap, loop);
- real processes: see processes.py.

Each returns a Trajectory: the averaged gradient of step 1 (what `Trainer.step`
leaves in every `.grad`) and the parameters after each of N steps. Telemetry's
periodic per-worker pass is switched off (`telemetry.noise_every=0`), so the
fused path is what really runs on step 0.
"""

from omegaconf import OmegaConf

from scaledrill.check.trajectory import Trajectory
from scaledrill.dist import LocalCollective

GRAD_PATHS = ("fused", "vmap", "loop")


def variant(cfg, **dotted) -> "OmegaConf":
    """A copy of `cfg` with dotted keys replaced, e.g. variant(cfg, **{"layout.procs": 2})."""
    out = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    for key, value in dotted.items():
        OmegaConf.update(out, key, value, force_add=True)
    return out


def engine_config(cfg, grads: str, workers: int | None = None, accum: int | None = None, procs: int = 1, backend: str = "local"):
    """The recipe laid out for one path of the check."""
    return variant(
        cfg,
        **{
            "layout.workers": workers or cfg.layout.workers,
            "layout.accum": accum or cfg.layout.accum,
            "layout.procs": procs,
            "layout.backend": backend,
            "train.grads": grads,
            "telemetry.noise_every": 0,
            "train.progress": False,
        },
    )


def follow(trainer, steps: int) -> Trajectory:
    """Run `steps` optimizer steps of `trainer`, recording what the check compares."""
    out = Trajectory(list(trainer.grads.names))
    for _ in range(steps):
        if trainer.step().skipped:
            out.skipped.append(trainer.step_index)
        out.record(trainer.params)
    return out


def run_engine(cfg, steps: int, model_hook=None) -> Trajectory:
    """One process, local collective; BatchNorm's statistics follow cfg.train.batchnorm, as in a run."""
    from scaledrill.train.engine import Trainer

    trainer = Trainer(cfg, LocalCollective())
    if model_hook is not None:
        model_hook(trainer.model)
    return follow(trainer, steps)


def accumulation(cfg, steps: int, **kw) -> Trajectory:
    L = cfg.layout
    return run_engine(engine_config(cfg, "fused", workers=1, accum=L.workers * L.accum), steps, **kw)


def virtual(cfg, grads: str, steps: int, **kw) -> Trajectory:
    return run_engine(engine_config(cfg, grads), steps, **kw)
