"""PowerSGD: rank-r approximation by one step of power iteration, warm-started.

Vogels, Karimireddy, Jaggi 2019, "PowerSGD: Practical Low-Rank Gradient
Compression for Distributed Optimization", Algorithm 1. Each parameter's gradient
is seen as a matrix M (first dim × the rest). Q (cols × r) is shared by all
workers: drawn once from the seed, identical everywhere, then reused from the
previous step (warm start), which turns the steps into a running power
iteration. The paper pairs it with error feedback; the configs turn
`sync.error_feedback` on, which keeps e_w = M_w − P̂ Q_wᵀ per worker.

Steps, for every compressed matrix, with the W workers' M_w:
1. P_w = M_w Q;                  average over workers (one all-reduce);
2. P̂ = orthonormal basis of P (QR; span(P̂) ⊇ span(P) even if P is rank-deficient);
3. Q_w = M_wᵀ P̂;                 average over workers (one all-reduce) -> Q;
4. output P̂ Qᵀ (= the average of the workers' P̂ Q_wᵀ); keep Q for the next step.

A 1-D parameter, or a matrix where r·(rows+cols)·`sync.min_saving` ≥
rows·cols, travels uncompressed with the P factors. Before `sync.exact_until` the
gradient is averaged exactly (early training is sensitive to gradient error),
as torch's PowerSGD hook does.

Tuning: r = 1–4 (the paper's rank 2 matched full-precision SGD on
ResNet-18/CIFAR-10, from memory); raise `exact_until` before raising r.
"""

import math
from dataclasses import dataclass

import torch

from scaledrill.sync.compress import Out, dense_bytes, mix


@dataclass
class PowerSGDState:
    q: torch.Tensor  # every compressed matrix's Q (cols × r), flattened and concatenated; shared


@dataclass(frozen=True)
class Block:
    offset: int  # in the flat gradient
    rows: int
    cols: int
    compress: bool

    @property
    def numel(self) -> int:
        return self.rows * self.cols


def plan(shapes: list[torch.Size], rank: int, min_saving: float) -> list[Block]:
    blocks, offset = [], 0
    for shape in shapes:
        numel = math.prod(shape)
        rows = shape[0] if len(shape) >= 2 else numel
        cols = numel // rows if len(shape) >= 2 else 1
        pays = len(shape) >= 2 and rank * (rows + cols) * min_saving < numel
        blocks.append(Block(offset, rows, cols, pays))
        offset += numel
    return blocks


class PowerSGD:
    per_worker = True
    lossless = False

    def __init__(self, rank: int = 1, exact_until: int = 0, min_saving: float = 1.0):
        self.rank, self.exact_until, self.min_saving = rank, exact_until, min_saving
        self.blocks: list[Block] = []

    def init(self, shapes, V, seed, dtype):
        self.blocks = plan(shapes, self.rank, self.min_saving)
        size = sum(b.cols * self.rank for b in self.blocks if b.compress)
        gen = torch.Generator().manual_seed(mix(seed, 0x505344))
        return PowerSGDState(torch.randn(size, generator=gen, dtype=dtype))

    def update(self, x, state, rnd):
        V, n = x.shape
        if rnd.step < self.exact_until:
            return Out(rnd.mean(x), x, dense_bytes(n, x.dtype)), state
        r, packed = self.rank, [b for b in self.blocks if b.compress]
        plain = [x[:, b.offset : b.offset + b.numel] for b in self.blocks if not b.compress]
        qs, at = [], 0
        for b in packed:
            qs.append(state.q[at : at + b.cols * r].view(b.cols, r).to(x.dtype))
            at += b.cols * r
        ms = [x[:, b.offset : b.offset + b.numel].view(V, b.rows, b.cols) for b in packed]
        # 1. P_w = M_w Q, averaged together with the uncompressed blocks
        ps_w = [m @ q for m, q in zip(ms, qs)]
        first = rnd.mean(torch.cat([p.reshape(V, -1) for p in ps_w] + plain, dim=1))
        # 2. orthonormal P̂
        ps, at = [], 0
        for b in packed:
            ps.append(torch.linalg.qr(first[at : at + b.rows * r].view(b.rows, r)).Q)
            at += b.rows * r
        # 3. Q_w = M_wᵀ P̂, averaged
        qs_w = [m.transpose(1, 2) @ p for m, p in zip(ms, ps)]
        q_mean = rnd.mean(torch.cat([q.reshape(V, -1) for q in qs_w], dim=1)) if packed else x.new_zeros(0)
        # 4. output P̂ Qᵀ; each worker's share P̂ Q_wᵀ
        mean, sent = torch.empty_like(x[0]), torch.empty_like(x)
        at_p, at_q = sum(p.numel() for p in ps), 0
        for b in self.blocks:
            cut = slice(b.offset, b.offset + b.numel)
            if b.compress:
                p, q = ps.pop(0), q_mean[at_q : at_q + b.cols * r].view(b.cols, r)
                mean[cut] = (p @ q.T).reshape(-1)
                sent[:, cut] = (p @ qs_w.pop(0).transpose(1, 2)).reshape(V, -1)
                at_q += b.cols * r
            else:
                mean[cut] = first[at_p : at_p + b.numel]
                sent[:, cut] = x[:, cut]
                at_p += b.numel
        wire = sum(r * (b.rows + b.cols) if b.compress else b.numel for b in self.blocks)
        return Out(mean, sent, dense_bytes(wire, x.dtype)), PowerSGDState(q_mean.to(state.q.dtype))
