"""Clip by global norm, once per optimizer step, after the gradients are averaged.

Clipping each micro-batch or each worker's gradient is not the clip of the
averaged gradient (docs/references.md, "Pitfalls"), so the engine calls this exactly once
per step on the averaged `.grad`s. With norm ‖g‖ over all parameters together,
every gradient is scaled by min(1, max_norm / ‖g‖) (Pascanu et al. 2013).

Tuning: set `optim.clip_norm` a little above the norms of a healthy run (the
telemetry records the pre-clip norm each step); clipping every step just lowers the
learning rate. null turns clipping off.
"""

import torch


def clip_by_global_norm(params, max_norm: float | None) -> float:
    """Scale the gradients in place so their global norm is at most `max_norm`; return the norm before."""
    grads = [p for p in params if p.grad is not None]
    if not grads:
        return 0.0
    if max_norm is None:
        return float(torch.nn.utils.get_total_norm([p.grad for p in grads]))
    return float(torch.nn.utils.clip_grad_norm_(grads, max_norm))
