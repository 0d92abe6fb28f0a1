"""Bitwise-reproducible reduction: sum worker gradients along one fixed binary tree.

Floating-point addition is not associative, so a ring all-reduce (or a process
summing its V rows and then all-reducing the P sums) adds the same W gradients in
an order that depends on P, V and the backend, and layouts differ in the last bits.
Those bits grow over training into visibly different runs. With `sync.bitwise=true`
the sum follows one tree over global worker ids instead, the same for every layout:

    level 0: the W worker rows in global id order
    level j+1: row i = row 2i + row 2i+1 of level j (an odd last row moves up unchanged)

Steps, for this process's V rows [V, n] (global ids [rank·V, (rank+1)·V)):
1. sum the process's subtree with the same pairwise rule (rows stay in id order);
2. all-gather the P subtree sums (rank order = global id order), per bucket;
3. finish the tree over the P sums with the same rule, identically on every process.

When V is a power of two, every level below log2(V) pairs rows inside one process
(W/2^j is even there), so steps 1-3 add exactly the pairs the W-leaf tree adds and
the result is bitwise the same for every P. With W a power of two that is every
layout of the same W. Each addition is an elementwise IEEE add, so vectorising it
changes nothing.

The per-worker rows must themselves not depend on the layout: the fused path's one
backward over V·b samples sums in an order that does, and vmap's batched kernels
may too (a batched convolution of 8 workers differs from a single one). So in
bitwise mode the sync takes one row per worker and `train.grads=auto` resolves to
the loop path (path.py), which computes each worker alone. Results are then bitwise equal
across layouts for the same number of intra-op threads per process (a threaded
reduction may split sums differently), which the engine pins to one in this mode.

Cost: each process receives the P−1 other subtree sums, (P−1)·n values, and holds
P·n, against 2·(P−1)/P·n sent and received per process for a ring all-reduce
(Patarasuk & Yuan 2009). That is about P/2 times the ring's traffic: fine for a
rehearsal on a few processes, not a method to ship at P = 512. BatchNorm running
statistics are still averaged as a mean of process means; they do not enter the
gradients or the parameters, only evaluation, and may differ in the last bits.
"""

import torch

from scaledrill.sync.buckets import bounds


def pairwise_sum(rows: torch.Tensor) -> torch.Tensor:
    """Σ over dim 0 of [m, n] along the fixed pairwise tree; returns [n]."""
    while rows.shape[0] > 1:
        pairs = rows[0 : rows.shape[0] // 2 * 2]
        summed = pairs[0::2] + pairs[1::2]
        rows = torch.cat([summed, rows[-1:]]) if rows.shape[0] % 2 else summed
    return rows[0].clone()


def tree_sum(rows: torch.Tensor, collective, bucket_kib: float) -> torch.Tensor:
    """Σ over this process's rows and over all processes, along the global tree; identical everywhere."""
    local = pairwise_sum(rows)  # 1.
    if collective.size == 1:
        return local
    out = torch.empty_like(local)
    for piece in bounds(local.numel(), local.element_size(), bucket_kib):
        gathered = collective.all_gather(local[piece])  # 2. [P, m]
        out[piece] = pairwise_sum(gathered)  # 3.
    return out
