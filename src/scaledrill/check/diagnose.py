"""Name the cause of a mismatch by rerunning targeted variants, and say how to fix it.

Checks, in order; each explains some of the failing paths and hands the rest on:
1. randomness: does the float64 reference itself change when only the global
   random state changes? Then rerun with every dropout module at p=0; the paths
   that now match are explained by dropout, and later checks run with it off;
2. a custom step: where it called reduce and clipping, and which wrong rule its
   gradient follows (diagnose_step.py);
3. stock BatchNorm left as it is (train.convert_batchnorm=false): does the path
   match when rerun with it converted to per-worker statistics? Then its
   BatchNorm normalised over other samples than each worker's own;
   BatchNorm (check.batchnorm=global, where the paths train with
   train.batchnorm=global): does the path match the reference with per-worker
   statistics instead? Then its BatchNorm never saw the other workers' samples;
4. fp16 overflow: did the path skip steps while the dynamic loss scale settled?
   The true batch never skips;
5. 16-bit accumulation (train.accum_dtype=bf16|fp16): does the path match when
   the micro-batch gradients are summed in fp32? Then the 16-bit sum lost the
   small contributions;
6. loss normalisation: is the task's loss a sum over units, i.e. is the loss of
   the whole batch the sum of the losses of its micro-batches?
7. otherwise: a match at check.tolerance_scale=1 means the scale was set too
   tight; a match when rerun in float64 means float32 rounding beyond the rule;
   else a real difference no check here names.
"""

from dataclasses import replace

import torch

from scaledrill.check.findings import Finding
from scaledrill.check.paths import variant
from scaledrill.check.reference import build_model, global_batches
from scaledrill.check.tolerance import Tolerance, compare, compare_grads
from scaledrill.nn.dropout import key_samples
from scaledrill.nn.ghost_bn import set_group_size
from scaledrill.nn.stock import stock_batchnorm
from scaledrill.tasks.base import build_task


def _rel(layers) -> float:
    return max(x.max_rel for x in layers)


def dropout_modules(model) -> list:
    return [m for m in model.modules() if "dropout" in type(m).__name__.lower() and hasattr(m, "p")]


def dropout_off(model) -> None:
    for m in dropout_modules(model):
        m.p = 0.0


class Diagnosis:
    def __init__(self, runner, ref, tol: Tolerance, failing, runs):
        self.runner, self.ref, self.tol = runner, ref, tol
        self.open = [r.name for r in failing]  # paths not yet explained
        self.runs, self.hook, self.findings = dict(runs), None, []

    def _explained(self, names, finding: Finding) -> None:
        self.open = [n for n in self.open if n not in names]
        self.findings.append(finding)

    def _rerun(self, name: str, **kw):
        return self.runner.run(name, model_hook=self.hook, **kw)

    # 1. -----------------------------------------------------------------------
    def randomness(self) -> None:
        shifted = self.runner.reference(model_hook=lambda m: torch.rand(7))  # only the random state moves
        moved = compare_grads(self.ref.names, shifted.grads, self.ref.grads, self.tol)
        if all(x.ok for x in moved):
            return
        task = build_model(self.runner.cfg)
        found = dropout_modules(task.model)
        if not found:
            self.findings.append(Finding(
                "random draws in the forward pass that are not keyed on the sample",
                f"the float64 reference's gradient changes by up to {_rel(moved):.3g} (relative) when only the global random state changes",
                "key every random draw (noise, augmentation) on the global sample index so every layout draws the same"))
            return
        self.hook = dropout_off
        self.ref = self.runner.reference(model_hook=dropout_off)
        fixed = []
        for name in self.open:
            self.runs[name] = self._rerun(name)
            if compare(name, self.runs[name], self.ref, self.tol).ok:
                fixed.append(name)
        kinds = sorted({type(m).__name__ for m in found})
        still = [n for n in self.open if n not in fixed]
        self._explained(fixed, Finding(
            "dropout masks come from each process's random stream, not from the sample",
            f"the float64 reference's gradient changes by up to {_rel(moved):.3g} (relative) when only the global random state changes; "
            f"with p=0 in {len(found)} {'/'.join(kinds)} module(s) " + (f"{', '.join(fixed)} match the true batch" if fixed else "no path matches yet")
            + (f"; {', '.join(still)} still differ (see below)" if still else ""),
            "draw masks keyed on the global sample index: scaledrill.nn.dropout.KeyedDropout (keys = micro_batches[m]['index'] "
            "in a custom step, or content_keys(input) in a model), so every layout drops the same units"))

    # 3. -----------------------------------------------------------------------
    def stock_batchnorm(self) -> None:
        cfg = self.runner.cfg
        if cfg.train.convert_batchnorm:
            return
        torch.manual_seed(cfg.train.seed)
        stock = stock_batchnorm(build_task(cfg.task).model)
        engine = [n for n in self.open if not n.startswith("step:")]
        if not stock or not engine:
            return
        converted = variant(cfg, **{"train.convert_batchnorm": True})
        reruns = {n: self.runner.run(n, cfg=converted, model_hook=self.hook) for n in engine}
        fixed = [n for n in engine if compare(n, reruns[n], self.ref, self.tol).ok]
        if not fixed:
            return
        L = cfg.layout
        self._explained(fixed, Finding(
            f"BatchNorm statistics: the model's stock BatchNorm ({', '.join(stock)}) normalised over the samples each "
            "call was given, not over each worker's own micro-batch",
            f"{', '.join(fixed)} match the true batch when the same BatchNorm keeps per-worker statistics of b = "
            f"{L.micro_batch} samples (train.convert_batchnorm=true); with train.convert_batchnorm=false the fused path "
            f"normalises all V·b samples of a process at once",
            "leave train.convert_batchnorm=true (the default), which makes every stock BatchNorm a GhostBatchNorm "
            "with the same parameters and buffers"))

    def batchnorm(self) -> None:
        if self.runner.batchnorm != "global":  # the paths trained with per-worker statistics, as the reference did
            return
        per_worker = self.runner.reference(batchnorm="worker", model_hook=self.hook)
        explained = [n for n in self.open if compare(n, self.runs[n], per_worker, self.tol).ok]
        if not explained:
            return
        L = self.runner.cfg.layout
        self._explained(explained, Finding(
            "BatchNorm statistics: the path trained with train.batchnorm=global, yet each worker normalised only its own micro-batch",
            f"{', '.join(explained)} match the reference with per-worker statistics of b = {L.micro_batch} samples "
            f"(check.batchnorm=worker), not the true batch's statistics over all B = {L.workers * L.micro_batch} samples",
            "train.batchnorm=global reaches BatchNorm through set_global_statistics, which sets `collective` on every "
            "GhostBatchNorm: a subclass whose forward ignores it keeps per-worker statistics; with plain GhostBatchNorm "
            "modules the engine did not apply the setting, a bug to report"))

    # 4. -----------------------------------------------------------------------
    def overflow_skips(self) -> None:
        skipping = {n: self.runs[n].skipped for n in self.open if self.runs[n].skipped}
        if not skipping:
            return
        cfg = self.runner.cfg
        start = (cfg.train.get("scaler") or {}).get("start", 65536.0)
        self._explained(list(skipping), Finding(
            "fp16 overflow: the path skipped steps while the dynamic loss scale settled, which the true batch never does",
            "; ".join(f"{n} skipped step(s) {', '.join(map(str, s))}" for n, s in skipping.items())
            + f" (the scale starts at train.scaler.start={start:g}); a skipped step leaves an inf gradient and unchanged parameters",
            "to compare the plumbing, start the scale lower (train.scaler.start) or set train.loss_scale=none; "
            "on the cluster a few skips at the start are normal, the overflow-storm detector watches for more"))

    # 5. -----------------------------------------------------------------------
    def accumulation_dtype(self) -> None:
        cfg = self.runner.cfg
        kind = cfg.train.get("accum_dtype", "fp32")
        engine = [n for n in self.open if not n.startswith("step:")]
        if kind == "fp32" or not engine:
            return
        wide = variant(cfg, **{"train.accum_dtype": "fp32"})
        fixed = []
        for name in engine:
            rerun = self._rerun(name, cfg=wide)
            if compare(name, rerun, self.ref, self.tol).ok:
                fixed.append(name)
        if not fixed:
            return
        bits = {"bf16": 8, "fp16": 11}[kind]
        self._explained(fixed, Finding(
            f"gradient accumulation in {kind}: a micro-batch's contribution smaller than the running sum's last bit is lost",
            f"{', '.join(fixed)} match the true batch when the micro-batch gradients are summed in fp32 (train.accum_dtype=fp32); "
            f"a {kind} sum keeps {bits} significant bits, so each addition rounds away about 2^-{bits} of the sum",
            "accumulate in fp32 (train.accum_dtype=fp32); to save bandwidth, cast once for the wire (sync=fp16 or sync=bf16)"))

    # 6. -----------------------------------------------------------------------
    def loss_normalisation(self) -> None:
        engine = [n for n in self.open if not n.startswith("step:")]
        if not engine:
            return
        cfg = self.runner.cfg
        dtype = self.runner.ref_dtype
        task = build_model(cfg, dtype)
        if self.hook:
            self.hook(task.model)
        b = cfg.layout.micro_batch
        set_group_size(task.model, b)
        batch = global_batches(cfg, task.data, 1, dtype)[0]
        with torch.no_grad():  # one forward, then the loss of the whole output and of its slices: the loss alone
            key_samples(task.model, batch["index"], 0)  # is judged, whatever randomness the model's forward holds
            out = task.model(batch["input"])
            whole = float(task.loss(out, batch))
            cuts = range(0, batch["input"].shape[0], b)
            parts = [{k: v[i : i + b] for k, v in batch.items()} for i in cuts]
            summed = sum(float(task.loss(out[i : i + b], p)) for i, p in zip(cuts, parts))
            counted = sum(float(task.loss.count(p)) for p in parts), float(task.loss.count(batch))
        if abs(whole - summed) <= 1e-9 * max(abs(whole), 1.0) and counted[0] == counted[1]:
            return
        self._explained(engine, Finding(
            "loss normalisation: the task's loss is not a sum over units, so the result depends on how the batch is split",
            f"on step 0's global batch, loss(all {batch['input'].shape[0]} samples) = {whole:.6g} but the sum over its micro-batches = {summed:.6g} "
            f"(units {counted[1]:g} vs {counted[0]:g}); a mean per micro-batch gives a mean of micro-batch means",
            "make the loss return the SUM of per-unit losses and count() the number of units (per_token=True for tokens); "
            "the engine divides once by the global count, as the true batch does"))

    # 7. -----------------------------------------------------------------------
    def leftover(self) -> None:
        for name in list(self.open):
            cfg = self.runner.cfg
            detail = ""
            spread = self.runs[name].worker_spread
            if spread > 0:
                detail = f"; the workers' (or ranks') copies differ from each other by up to {spread:.3g}"
            plain = replace(self.tol, scale=1.0)
            if self.tol.scale < 1 and compare(name, self.runs[name], self.ref, plain).ok:
                self._explained([name], Finding(
                    "the tolerance is set below float rounding",
                    f"{name} matches at check.tolerance_scale=1; at {self.tol.scale:g} the bound is tighter than the rounding "
                    f"of {cfg.train.dtype} arithmetic{detail}",
                    "use check.tolerance_scale=1 (the rounding-derived rule) or more"))
                continue
            if cfg.train.dtype == "float32" and self.runner.ref_dtype == torch.float64 and not name.startswith("processes:"):
                wide = self.runner.run(name, cfg=variant(cfg, **{"train.dtype": "float64"}), model_hook=self.hook)
                wide_tol = self.tol.without_floor(unit=2.0**-53)
                if compare(name, wide, self.ref, wide_tol).ok:
                    self._explained([name], Finding(
                        "float32 rounding larger than the tolerance rule allows",
                        f"{name} matches the true batch when rerun in float64{detail}",
                        "raise check.tolerance_scale for this model, or train in float64 (train.dtype=float64) where it matters"))
                    continue
            first = compare(name, self.runs[name], self.ref, self.tol)
            layers = [x.layer for x in first.layers if not x.ok]
            self._explained([name], Finding(
                f"{name} differs from the true batch for a reason none of the checks names",
                f"layers off after step 1: {', '.join(layers) or 'none'}; trajectory first off at step "
                f"{first.trajectory.first_bad_step if first.trajectory else '-'}{detail}",
                "compare this path's step function with the protocol in scaledrill.check.threads and the pitfalls in the project's docs/references.md"))

    def run(self) -> list[Finding]:
        from scaledrill.check.diagnose_step import step_checks

        self.randomness()
        if self.open:
            step_checks(self)
        for check in (self.stock_batchnorm, self.batchnorm, self.overflow_skips, self.accumulation_dtype, self.loss_normalisation, self.leftover):
            if self.open:
                check()
        return self.findings


def diagnose(runner, ref, tol, failing, runs) -> list[Finding]:
    return Diagnosis(runner, ref, tol, failing, runs).run()
