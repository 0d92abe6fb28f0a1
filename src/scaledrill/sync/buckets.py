"""Buckets: the flat vector travels in contiguous pieces of at most `sync.bucket_kib`.

Pieces follow the flat vector as it is (parameter order, not cut at parameter
edges): one all-reduce per bucket bounds the memory a collective holds while
keeping calls few. Where exact averaging of the fused path overlaps backward
(overlap.py), the same pieces start from the last one down as backward finishes
them, so both ways give the same sums.

Steps, for rows [V, m] of one dtype:
1. sum the V rows inside the process (in that dtype);
2. one in-place SUM all-reduce per bucket across the P processes, all buckets
   in flight at once where the backend allows (small buckets pay latency, not
   bandwidth).
The caller divides by W once. A single row is copied first unless the caller
donates it (`in_place`): the copy of a large vector costs a visible share of a
loopback all-reduce.
"""

import torch


def bounds(m: int, itemsize: int, bucket_kib: float) -> list[slice]:
    """Contiguous slices of at most `bucket_kib` KiB covering range(m)."""
    per = max(1, int(bucket_kib * 2**10) // itemsize)
    return [slice(a, min(a + per, m)) for a in range(0, m, per)]


def bucketed_sum(rows: torch.Tensor, collective, bucket_kib: float, in_place: bool = False) -> torch.Tensor:
    """Σ over rows and over processes; identical on every process."""
    if rows.shape[0] > 1:  # 1.
        flat = rows.sum(dim=0)
    else:
        flat = rows[0] if in_place else rows[0].clone()
    if collective.size > 1:  # 2.
        collective.all_reduce_many([flat[piece] for piece in bounds(flat.numel(), flat.element_size(), bucket_kib)])
    return flat
