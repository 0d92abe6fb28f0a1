"""One-process comparisons: the engine step against a plain torch step, the gradient
paths against each other, compressors against exact, telemetry on against off.

Every case is a whole `trainer.step()` (data, gradients, sync, clip, optimizer,
telemetry record) unless its docstring says otherwise.
"""

import copy
import tempfile
from pathlib import Path

import torch

from .common import MICRO, WORKERS, batch_fetch, trainer
from .timing import Row, interleave, ms, ratios

COMPRESSORS = ("fp16", "bf16", "topk", "randk", "sign", "qsgd", "powersgd")
COMPRESSOR_GOAL = "<= 1.15"  # every compressor's whole step vs exact (issue 20)


def plain_step(tr):
    """A hand-written torch step on the engine's first 512 samples: the physical limit.

    Same model (deep-copied, ghost batch norm included), same samples gathered from
    the training set, the loss as a mean over the global batch, backward, torch SGD
    with the recipe's momentum.
    """
    model = copy.deepcopy(tr.model)
    node = tr.cfg.optim
    opt = torch.optim.SGD(model.parameters(), lr=tr.recipe.lr_at(0), momentum=node.get("momentum", 0.0))
    fetch = batch_fetch(tr)
    loss, count = tr.task.loss, float(tr.layout.global_batch)

    def step():
        batch = fetch()
        opt.zero_grad(set_to_none=True)
        (loss(model(batch["input"]), batch) / count).backward()
        opt.step()

    return step


def paths(rounds: int, loop_rounds: int) -> list[Row]:
    """fused vs plain torch; vmap vs fused; loop vs vmap (W=64, b=8, B=512)."""
    fused, vm, lp = (trainer(f"train.grads={p}") for p in ("fused", "vmap", "loop"))
    fast = interleave({"plain": plain_step(fused), "fused": fused.step, "vmap": vm.step}, rounds, block=5, warmup=3)
    slow = interleave({"vmap": vm.step, "loop": lp.step}, loop_rounds, block=1, warmup=1)
    setting = f"W={WORKERS}, b={MICRO}"
    times = {k: f"{ms(v):.1f} ms" for k, v in fast.items()} | {"loop": f"{ms(slow['loop']):.0f} ms"}
    return [
        Row("engine fused step / plain torch step", ratios(fast, "fused", "plain")["median"], ratios(fast, "fused", "plain"),
            "<= 1.10", note=f"{setting}; fused {times['fused']}, plain {times['plain']}", detail={"ms": times}),
        Row("loop step / vmap step (vmap speed-up)", ratios(slow, "loop", "vmap")["median"], ratios(slow, "loop", "vmap"),
            ">= 3", note=f"{setting}; vmap {ms(slow['vmap']):.1f} ms, loop {times['loop']}"),
        Row("vmap step / fused step", ratios(fast, "vmap", "fused")["median"], ratios(fast, "vmap", "fused"),
            "<= 2.0", note=f"{setting}; vmap {times['vmap']}; dominated by per-worker weight gradients "
            "(the convolution weight gradient as a grouped convolution over W)"),
    ]


def compressors(rounds: int, workers: int = WORKERS) -> list[Row]:
    """Each compressor's whole step against exact averaging on the same (vmap) path.

    PowerSGD starts compressing at step 0 here (its config waits 10 steps by
    default, and exact steps would flatter it). Fidelity stays at its default (on),
    so lossy methods also pay for the exact average they are compared with.
    """
    built = {"exact": trainer("train.grads=vmap", workers=workers)}
    for name in COMPRESSORS:
        extra = ("sync.exact_until=0",) if name == "powersgd" else ()
        built[name] = trainer(f"sync={name}", "train.grads=vmap", *extra, workers=workers)
    times = interleave({k: t.step for k, t in built.items()}, rounds, block=2, warmup=2)
    rows = []
    for name in COMPRESSORS:
        r = ratios(times, name, "exact")
        wire = built[name].sync.stats.get("compression_ratio", 1.0)
        rows.append(Row(f"compressor {name} / exact (vmap step)", r["median"], r, COMPRESSOR_GOAL,
                        note=f"W={workers}; {ms(times[name]):.1f} ms vs {ms(times['exact']):.1f} ms; wire 1/{wire:.0f}"))
    return rows


def observed(tr, monitor):
    """A step whose record goes through the telemetry monitor and its run store, as in a run
    (which also lets the trainer ask the monitor whether a detector will fire)."""
    tr.alarm = monitor.would_fire

    def step():
        monitor.observe(tr.step())
    return step


def default_noise_period() -> int:
    """`telemetry.noise_every` as the shipped schema sets it (the runs above turn it off)."""
    from scaledrill.telemetry.settings import DEFAULTS

    return int(DEFAULTS.noise_every)


def telemetry(rounds: int) -> list[Row]:
    """Telemetry on (scalars to the run store every step, layer stats every 10) vs off.

    Blocks of 10 steps, so every block holds exactly one layer-stats step. The
    noise-scale step (a per-worker step on the fused path) is timed apart: every
    step of `noisy` is one, and its amortised cost at the default period follows.
    """
    from scaledrill.telemetry.monitor import Monitor
    from scaledrill.train.engine import config_yaml

    off = trainer("train.grads=fused")
    on = trainer("train.grads=fused", "telemetry.layer_every=10")
    noisy = trainer("train.grads=fused", "telemetry.noise_every=1")
    period = default_noise_period()
    with tempfile.TemporaryDirectory() as tmp:
        lay = on.layout
        monitor = Monitor(on.cfg, Path(tmp), 0, lay.micro_batch * lay.accum, lay.global_batch, config_yaml(on.cfg))
        times = interleave({"off": off.step, "on": observed(on, monitor), "noise": noisy.step}, rounds, block=10, warmup=3)
        monitor.close("finished")
    tel, noise = ratios(times, "on", "off"), ratios(times, "noise", "off")
    amortised = 1 + (noise["median"] - 1) / period
    return [
        Row("telemetry on / off (fused step)", tel["median"], tel, "<= 1.05", note="scalars every step to SQLite, layer stats every 10"),
        Row("noise-scale step / plain fused step", noise["median"], noise, None,
            note=f"amortised at noise_every={period}: x{amortised:.3f}", detail={"amortised": amortised, "period": period}),
    ]
