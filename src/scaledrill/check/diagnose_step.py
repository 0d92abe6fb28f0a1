"""Causes specific to a custom step function (see threads.py for the protocol).

1. where it synced: the last `reduce` came before the k-th forward pass, so the
   later micro-steps' gradients never left the worker (and workers disagree);
2. where it clipped: a torch clipping call before the last forward pass or before
   the last reduce clips a micro-batch's or one worker's gradient, not the average;
3. which normalisation its gradient follows, tested against float64 variants built
   from per-micro-batch gradients g_wm with unit counts n_wm:
     true batch          Σ g_wm / Σ n_wm
     micro-batch means   (1/(W·k)) Σ_wm g_wm / n_wm
     worker means        (1/W) Σ_w (Σ_m g_wm) / (Σ_m n_wm)   (uneven counts per worker)
4. weight decay inside the step: the error is a multiple of the parameters.
"""

import torch

from scaledrill.check.findings import Finding
from scaledrill.check.paths import variant
from scaledrill.check.reference import build_model
from scaledrill.check.threads import worker_micro_batches
from scaledrill.check.tolerance import compare_grads
from scaledrill.layout import Layout
from scaledrill.nn.ghost_bn import set_group_size
from scaledrill.tasks.sampler import Sampler


def laid_out(cfg, name: str):
    L = cfg.layout
    return cfg if name == "step:workers" else variant(cfg, **{"layout.workers": 1, "layout.accum": L.workers * L.accum})


def variant_grads(cfg, hook) -> tuple[dict, list]:
    """The three normalisations of the first step in float64, and the initial parameters."""
    layout = Layout.from_config(cfg.layout)
    task = build_model(cfg)
    if hook:
        hook(task.model)
    set_group_size(task.model, layout.micro_batch)
    params = list(task.model.parameters())
    sampler = Sampler(task.data.train.size, layout, cfg.train.seed, cfg.train.tail)
    micro = worker_micro_batches(task.data, sampler, layout, 0, torch.float64)
    zero = [torch.zeros_like(p) for p in params]
    total, micro_means, worker_means, units = [z.clone() for z in zero], [z.clone() for z in zero], [z.clone() for z in zero], 0.0
    for batches in micro:
        mine, mine_units = [z.clone() for z in zero], 0.0
        for b in batches:
            g = torch.autograd.grad(task.loss(task.model(b["input"]), b), params)
            n = float(task.loss.count(b))
            for acc, m, x in zip(mine, micro_means, g):
                acc += x
                m += x / n / (layout.workers * layout.accum)
            mine_units += n
        for t, w, x in zip(total, worker_means, mine):
            t += x
            w += x / mine_units / layout.workers
        units += mine_units
    variants = {"true batch": [t / units for t in total], "micro-batch means": micro_means, "worker means": worker_means}
    return variants, [p.detach().clone() for p in params]


def step_checks(diag) -> None:
    for name in [n for n in diag.open if n.startswith("step:")]:
        finding = _one(diag, name)
        if finding is not None:
            finding.evidence = f"{name}: {finding.evidence}"
            diag._explained([name], finding)


def _one(diag, name: str):
    run, probe, cfg = diag.runs[name], diag.runner.probes.get(name), laid_out(diag.runner.cfg, name)
    k = cfg.layout.accum
    spread = f"; workers ended step 1 with gradients up to {run.worker_spread:.3g} apart" if run.worker_spread > 0 else ""
    if probe is not None and probe.reduce_at and probe.reduce_at[-1] < k:  # 1.
        last = probe.reduce_at[-1]
        return Finding(
            "sync on the wrong micro-step: gradients of the later micro-steps stay local to each worker",
            f"worker 0 called reduce after {sorted(set(probe.reduce_at))} of its {k} forward passes; after the last call "
            f"(forward {last}) micro-steps {last + 1}..{k} were never averaged{spread}",
            "accumulate all k micro-batches locally and reduce once, after the last micro-step; scale each micro-loss by W/N "
            "(N the global count of units) so the reduced sum is the true batch's gradient")
    if probe is not None and probe.clip_at:  # 2.
        last_reduce = probe.reduce_at[-1] if probe.reduce_at else -1
        early = [c for c in probe.clip_at if c < k or c <= last_reduce]
        if early:
            return Finding(
                "clipping inside the micro-step loop: each micro-batch's gradient is clipped, not the averaged one",
                f"a torch clipping function was called after forward passes {probe.clip_at} of {k}, before the gradients "
                f"were summed over micro-steps and averaged over workers{spread}",
                "clip once per optimizer step, after averaging (optim.clip_norm: the engine and this check's harness do exactly that)")
    variants, start = variant_grads(cfg, diag.hook)  # 3.
    tol = diag.tol
    fits = {label: compare_grads(run.names, run.grads, g, tol) for label, g in variants.items()}
    if not all(x.ok for x in fits["true batch"]):
        if all(x.ok for x in fits["micro-batch means"]):
            return Finding(
                "loss normalisation: a mean of micro-batch means, so micro-batches with fewer units weigh more",
                f"the gradient equals (1/(W·k)) Σ ∇L_wm / n_wm within rounding (max rel error "
                f"{max(x.max_rel for x in fits['micro-batch means']):.3g}) and differs from the true batch by up to "
                f"{max(x.max_rel for x in fits['true batch']):.3g}",
                "sum the unit losses of every micro-batch and divide by the global count of units: "
                "N = reduce(local count)·W, micro-loss × W/N, then reduce the accumulated gradient")
        if all(x.ok for x in fits["worker means"]):
            return Finding(
                "uneven units per worker averaged as an unweighted mean of worker means",
                f"the gradient equals (1/W) Σ_w ∇L_w / n_w within rounding, not the true batch (max rel error "
                f"{max(x.max_rel for x in fits['true batch']):.3g})",
                "weight each worker by its count of units (divide by the global count, not the worker's), or drop/pad the tail explicitly")
    residual = [g - t for g, t in zip(run.grads, variants["true batch"])]  # 4.
    for layer, r, p in zip(run.names, residual, start):
        if p.dim() >= 2 and float(r.norm()) > 0 and float(p.norm()) > 0:
            cos = float(torch.dot(r.flatten(), p.flatten()) / (r.norm() * p.norm()))
            if cos > 0.99:
                lam = float(torch.dot(r.flatten(), p.flatten()) / p.square().sum())
                return Finding(
                    "weight decay added inside the step (per micro-step or before averaging)",
                    f"in {layer} the gradient's error is {lam:.3g} × the parameters (cosine {cos:.4f}){spread}",
                    "leave weight decay to the optimizer (optim.weight_decay), applied once per step after averaging")
    return None
