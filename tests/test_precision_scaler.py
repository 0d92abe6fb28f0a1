"""Outside checks of mixed precision: torch's own autocast and torch.amp.GradScaler.

The engine's loss scaling (train/precision.py) must follow the sequence torch's
GradScaler produces when it drives a plain torch optimizer on the same model and
batches: the same scale each step, the same skipped steps, the same parameters.
"""

import copy

import pytest
import torch
import torch.nn.functional as F

from conftest import make_config
from scaledrill.dist import LocalCollective
from scaledrill.train.engine import Trainer

STEPS = 30


def scaler_config(*extra):
    # One worker, one micro-batch of 64 (a power of two, so 1/B and every scale are exact):
    # the engine's step is then a plain step on the same batch.
    return make_config(
        "task=teacher", "layout.workers=1", "layout.micro_batch=64", "optim=sgd", "optim.lr=0.01", "optim.momentum=0.9",
        "train.precision=fp16", "telemetry.noise_every=0", "telemetry.layer_every=0",
        # A start far above what fp16 holds forces overflows at first; a large growth factor
        # after 3 clean steps forces them again and again, so the 30 steps skip and apply in turn.
        "train.scaler.start=68719476736.0", "train.scaler.grow=256.0", "train.scaler.shrink=0.25", "train.scaler.patience=3",
        *extra,
    )


def test_loss_scaling_follows_torch_gradscaler_step_for_step():
    cfg = scaler_config()
    trainer = Trainer(cfg, LocalCollective())
    model = copy.deepcopy(trainer.model)  # same initial parameters
    optimizer = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)
    # The reference: torch.amp.GradScaler with the same start, factors and interval.
    scaler = torch.amp.GradScaler("cpu", init_scale=2.0**36, growth_factor=256.0, backoff_factor=0.25, growth_interval=3)
    ours, theirs = [], []
    for step in range(STEPS):
        batch = trainer._micro_batches(step)[0]  # the batch the engine takes on this step
        record = trainer.step()
        ours.append((record.precision["loss_scale"], record.skipped))

        used = scaler.get_scale()
        optimizer.zero_grad()
        with torch.autocast("cpu", dtype=torch.float16):
            loss = F.mse_loss(model(batch["input"]), batch["target"], reduction="sum") / batch["input"].shape[0]
        scaler.scale(loss).backward()
        scaler.step(optimizer)
        scaler.update()
        theirs.append((used, scaler.get_scale() < used))  # GradScaler backs off exactly on the steps it skipped
        for mine, ref in zip(trainer.model.parameters(), model.parameters()):
            torch.testing.assert_close(mine, ref, rtol=0, atol=0, msg=f"parameters differ after step {step}")
    assert ours == theirs
    skipped = sum(s for _, s in ours)
    assert 5 <= skipped <= STEPS - 10  # both overflows and applied steps were exercised
    assert trainer.precision.scaler.skipped == skipped


@pytest.mark.parametrize("precision, dtype", [("bf16", torch.bfloat16), ("fp16", torch.float16)])
def test_fused_path_under_autocast_equals_plain_torch_autocast(precision, dtype):
    # 4 workers of 16 digits each with ghost batch norm (groups of 16), fused path, no loss scaling:
    # the averaged gradient must be plain torch autocast's gradient of the mean loss on the same 64 samples.
    cfg = make_config("layout.workers=4", "layout.micro_batch=16", "train.grads=fused", f"train.precision={precision}",
                      "train.loss_scale=none", "telemetry.noise_every=0")
    trainer = Trainer(cfg, LocalCollective())
    model = copy.deepcopy(trainer.model)
    batch = trainer._micro_batches(0)[0]
    trainer.step()
    with torch.autocast("cpu", dtype=dtype):
        logits = model(batch["input"])
        # A data-parallel worker's loss is the mean over its own b samples, and the all-reduce
        # averages over the W workers. In fp16 the order matters: the backward carries values
        # W times those of the global mean's, which underflow less.
        loss = F.cross_entropy(logits, batch["target"], reduction="sum") / 16
    assert logits.dtype == dtype  # the forward really ran in 16 bits
    grads = [g / 4 for g in torch.autograd.grad(loss, list(model.parameters()))]
    for (name, p), g in zip(trainer.model.named_parameters(), grads):
        assert p.grad.dtype == torch.float32  # master gradients stay float32
        torch.testing.assert_close(p.grad, g, msg=f"{precision} gradient of {name}")
