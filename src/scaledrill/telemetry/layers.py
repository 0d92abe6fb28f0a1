"""Per-layer norms: weight, gradient, update and the update/weight ratio.

Why: a large-batch run that diverges usually does so one layer first, and the
update/weight ratio of that layer is what LARS and LAMB exist to bound (You, Gitman
and Ginsburg 2017, "Large Batch Training of Convolutional Networks", arXiv
1708.03888). Watching it per layer shows which layer outran its weights.

How: one fused `torch._foreach_norm` over every tensor, then a single transfer of
all norms to Python, so the cost is one pass over the parameters.
"""

from collections.abc import Sequence

import torch


def layer_stats(
    names: Sequence[str],
    params: Sequence[torch.Tensor],
    grads: Sequence[torch.Tensor | None],
    updates: Sequence[torch.Tensor | None],
) -> dict[str, dict[str, float]]:
    """Norms of each named parameter, its gradient and its last update (new − old value).

    A missing gradient or update (None) counts as zero. The ratio is 0.0 for a
    tensor whose weights are all zero (e.g. a bias at initialisation), so it never
    reads as infinite growth.
    """
    if not len(names) == len(params) == len(grads) == len(updates):
        raise ValueError("names, params, grads and updates must have one entry per parameter")
    if not names:
        return {}
    present = [t.detach() for group in (params, grads, updates) for t in group if t is not None]
    norms = iter(torch.stack([n.float() for n in torch._foreach_norm(present)]).tolist())
    values = [[0.0 if t is None else next(norms) for t in group] for group in (params, grads, updates)]
    out = {}
    for name, w, g, u in zip(names, *values):
        out[name] = {"weight_norm": w, "grad_norm": g, "update_norm": u, "update_ratio": u / w if w > 0 else 0.0}
    return out
