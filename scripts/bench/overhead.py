"""The engine's cost over a plain torch loop, and the per-worker path's over fused,
on the small proxies users rehearse on (W=64 workers of b=8, B=512).

Models: an MLP with LayerNorm and a shared layer (~1 ms plain steps), an MLP with
stock BatchNorm1d (the engine's per-worker ghost statistics against plain BN over
the whole batch), the digits CNN, the char transformer (task charlm).

Cases, interleaved in blocks of 50 steps (so every block holds the same telemetry
work: layer statistics every 10 steps and a noise-scale step every 25 at the
default settings):
- plain: a hand-written loop on the user's stock model, built from the same seed
  (before the engine converts BatchNorm and Dropout): the step's samples gathered
  from the training set, the loss over the global count, backward, torch SGD with
  the recipe's momentum;
- engine: `trainer.step()` with the default telemetry, each record observed by the
  monitor and written to a run store in a temporary folder, as in a run;
- fused, vmap: the two gradient paths with telemetry off.
"""

import tempfile
from pathlib import Path

import torch

from scaledrill.tasks.base import build_task
from scaledrill.telemetry.settings import DEFAULTS

from .common import MICRO, WORKERS, batch_fetch, trainer
from .single import observed
from .timing import Row, interleave, ms, ratios

BENCH_DATA = "task.data._target_=bench.models.FixedTeacher"
MODELS = {
    "LayerNorm MLP": ("task=teacher", "task.model._target_=bench.models.LayerNormMLP", BENCH_DATA, "task.model.hidden=64",
                      "optim.lr=0.02"),  # at the default 0.1 it diverges within 10 steps
    "BatchNorm MLP": ("task=teacher", "task.model._target_=bench.models.BatchNormMLP", BENCH_DATA),
    "digits CNN": ("task=digits",),
    "char transformer": ("task=charlm",),
}
DEFAULT_TELEMETRY = (f"telemetry.layer_every={DEFAULTS.layer_every}", f"telemetry.noise_every={DEFAULTS.noise_every}")
BLOCK = 50  # a multiple of both default periods


def stock_model(tr) -> torch.nn.Module:
    """The user's model as built by the task config, before the engine adapts it."""
    torch.manual_seed(tr.cfg.train.seed)
    return build_task(tr.cfg.task).model.to(tr.dtype).train()


def plain_step(tr):
    """One step of a hand-written torch loop on the trainer's first global batch."""
    model = stock_model(tr)
    opt = torch.optim.SGD(model.parameters(), lr=tr.recipe.lr_at(0), momentum=tr.cfg.optim.get("momentum", 0.0))
    fetch = batch_fetch(tr)
    loss = tr.task.loss

    def step():
        batch = fetch()
        opt.zero_grad(set_to_none=True)
        out = model(batch["input"])
        (loss(out, batch) / loss.count(batch)).backward()
        opt.step()

    return step


def compare(label: str, overrides: tuple, rounds: int, block: int) -> list[Row]:
    engine = trainer(*overrides, *DEFAULT_TELEMETRY)
    fused, vm = trainer(*overrides, "train.grads=fused"), trainer(*overrides, "train.grads=vmap")
    with tempfile.TemporaryDirectory() as tmp:
        from scaledrill.telemetry.monitor import Monitor
        from scaledrill.train.engine import config_yaml

        lay = engine.layout
        monitor = Monitor(engine.cfg, Path(tmp), 0, lay.micro_batch * lay.accum, lay.global_batch, config_yaml(engine.cfg))
        cases = {"plain": plain_step(engine), "engine": observed(engine, monitor), "fused": fused.step, "vmap": vm.step}
        times = interleave(cases, rounds, block=block, warmup=3)
        monitor.close("finished")
    if monitor.incidents:  # a firing detector writes an incident record each step it fires: not a step to time
        raise RuntimeError(f"{label}: a detector fired during the benchmark ({monitor.incidents[0]}); lower its optim.lr")
    took = {k: f"{ms(v):.2f} ms" for k, v in times.items()}
    setting = f"W={WORKERS}, b={MICRO}, {engine.grads.numel:,} params"
    over, path = ratios(times, "engine", "plain"), ratios(times, "vmap", "fused")
    return [
        Row(f"{label}: engine step (default telemetry) / plain torch", over["median"], over, "<= 1.10",
            note=f"{setting}; engine {took['engine']}, plain {took['plain']}", detail={"ms": took}),
        Row(f"{label}: vmap step / fused step", path["median"], path, "<= 1.30",
            note=f"telemetry off; vmap {took['vmap']}, fused {took['fused']}"),
    ]


def run(rounds: dict[str, int], block: int = BLOCK) -> list[Row]:
    """`rounds`: rounds per model label (the slow models get fewer)."""
    rows = []
    for label, overrides in MODELS.items():
        rows += compare(label, overrides, rounds[label], block)
    return rows
