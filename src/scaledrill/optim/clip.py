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


def clip_flat(flat: torch.Tensor, max_norm: float | None) -> float:
    """`clip_by_global_norm` for gradients held in one flat vector (the engine's averaged
    gradient, of which every `.grad` is a view): one norm kernel and one scale instead of
    one per tensor. Scales `flat` in place by min(1, max_norm / (‖g‖ + 1e-6)), as torch's
    clip_grad_norm_ does; returns ‖g‖ before."""
    norm = torch.linalg.vector_norm(flat)
    if max_norm is not None:
        flat.mul_(torch.clamp(max_norm / (norm + 1e-6), max=1.0))
    return float(norm)
