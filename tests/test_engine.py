"""The engine: gradient paths agree, the global gradient is the true batch gradient,
and the demo task learns."""

import torch

from conftest import make_config
from scaledrill.dist import LocalCollective
from scaledrill.train.engine import Trainer, run_training
from scaledrill.train.grads import flatten_params

# float64 rounding: each gradient entry is a sum of at most B terms, so differences
# between summation orders stay below B·eps64·Σ|terms| ≈ 1e-13 relative here.
F64_RTOL = 1e-10


def _trainer(*overrides):
    return Trainer(make_config(*overrides), LocalCollective())


def test_fused_vmap_loop_agree_every_step_with_batchnorm():
    base = ("task=digits", "layout.workers=4", "layout.micro_batch=8", "layout.accum=2", "train.dtype=float64", "telemetry.noise_every=0")
    trainers = {path: _trainer(*base, f"train.grads={path}") for path in ("fused", "vmap", "loop")}
    for step in range(3):
        records = {path: t.step() for path, t in trainers.items()}
        params = {path: flatten_params(t.params) for path, t in trainers.items()}
        buffers = {path: torch.cat([b.double().reshape(-1) for b in t.model.buffers()]) for path, t in trainers.items()}
        for path in ("vmap", "loop"):
            assert abs(records[path].loss - records["fused"].loss) <= F64_RTOL * abs(records["fused"].loss), (step, path)
            assert torch.allclose(params[path], params["fused"], rtol=F64_RTOL, atol=1e-12), (step, path)
            # running BatchNorm statistics: the mean over workers of each worker's statistics
            assert torch.allclose(buffers[path], buffers["fused"], rtol=F64_RTOL, atol=1e-12), (step, path)
    # the three paths really ran and moved the parameters
    assert [t.path for t in trainers.values()] == ["fused", "vmap", "loop"]
    assert records["fused"].grad_norm > 0


def test_global_gradient_equals_plain_autograd_on_the_true_batch():
    """Outside reference: plain single-process torch autograd over the same B samples."""
    t = _trainer("task=teacher", "layout.workers=8", "layout.micro_batch=4", "layout.accum=2", "train.dtype=float64", "optim.momentum=0.0")
    reference = {n: p.detach().clone().requires_grad_(True) for n, p in t.model.named_parameters()}
    index = t.sampler.global_batch(0)
    batch = {k: (v.double() if v.is_floating_point() else v) for k, v in t.task.data.train.take(index).items()}
    out = torch.func.functional_call(t.model, reference, (batch["input"],))
    mean_loss = t.task.loss(out, batch) / len(index)
    expected = torch.autograd.grad(mean_loss, list(reference.values()))
    record = t.step()
    got = [p.grad for p in t.params]
    for g, e in zip(got, expected):
        assert torch.allclose(g, e, rtol=1e-12, atol=1e-14)
    assert abs(record.loss - float(mean_loss.detach())) < 1e-12 * abs(float(mean_loss.detach()))


def test_token_loss_is_normalised_by_the_global_count_of_valid_tokens():
    t = _trainer("task=charlm", "layout.workers=4", "layout.micro_batch=4", "train.dtype=float64", "telemetry.noise_every=0")
    reference = {n: p.detach().clone().requires_grad_(True) for n, p in t.model.named_parameters()}
    batch = t.task.data.train.take(t.sampler.global_batch(0))
    batch = {k: (v.double() if v.is_floating_point() else v) for k, v in batch.items()}
    out = torch.func.functional_call(t.model, reference, (batch["input"],))
    per_token = t.task.loss(out, batch) / t.task.loss.count(batch)
    expected = torch.autograd.grad(per_token, list(reference.values()))
    t.step()
    for g, e in zip((p.grad for p in t.params), expected):
        assert torch.allclose(g, e, rtol=1e-11, atol=1e-13)


def test_digits_reaches_a_sensible_test_accuracy():
    """scikit-learn's copy of the UCI Optical Recognition of Handwritten Digits set; a small
    CNN gets well above 90% test accuracy (common practice for this set)."""
    cfg = make_config("task=digits", "layout.workers=4", "layout.micro_batch=8", "train.steps=300", "train.eval_every=0", "optim.lr=0.02")
    summary = run_training(cfg, LocalCollective())
    assert summary["eval"]["accuracy"] >= 0.93, summary["eval"]
    assert summary["samples_seen"] == 300 * 32
    assert summary["dropped_samples"] == (1437 % 32) * (300 // (1437 // 32))


def test_noise_steps_without_rows_give_the_rows_noise_statistics():
    """From its second noise step on, the fused path measures each worker's |g|² without the [W, n]
    rows (train/rows.py, Gram matrices and per-module rows); a twin trainer kept on the rows gives
    the same squared norms, loss and weights. digits (convolutions, ghost BN) and the teacher MLP."""
    for task in ("task=digits", "task=teacher"):
        base = (task, "layout.workers=4", "layout.micro_batch=4", "layout.accum=2", "train.dtype=float64",
                "telemetry.noise_every=1")
        norms, rows = _trainer(*base), _trainer(*base)
        rows.sync_is_exact = False  # the engine's route to the rows (and to the exact sum, equal here)
        for step in range(3):
            a, b = norms.step(), rows.step()
            assert a.small_sq is not None and a.small_sq > 0
            for key in ("small_sq", "big_sq", "loss", "grad_norm"):
                want = getattr(b, key)
                assert abs(getattr(a, key) - want) <= F64_RTOL * abs(want), (task, step, key)
        assert norms.grads.rules_ready  # the rules served the later steps
        assert torch.allclose(flatten_params(norms.params), flatten_params(rows.params), rtol=F64_RTOL, atol=1e-12)
