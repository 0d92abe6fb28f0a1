"""Per-worker gradient rows from ONE forward/backward over the process's V·b samples.

A weight that meets the samples only through its module's forward has, for
worker v, the gradient Σ over v's samples of that module's per-sample term. From
the module's saved input x and the gradient g of its output (both from the one
fused pass), the rows come out per group of samples, as per-example gradients do
(Goodfellow 2015, "Efficient Per-Example Gradient Computations", arXiv 1510.01799),
here summed within each worker's b samples:
- Linear  y = x·Wᵀ + c:   ∂W[v] = Σ_{i∈v} g_iᵀ·x_i (one batched matmul over the V
  workers, the FLOPs of the big-batch weight gradient), ∂c[v] = Σ_{i∈v} g_i;
- LayerNorm  y = x̂ ⊙ w + c:   ∂w[v] = Σ_{i∈v} g_i ⊙ x̂_i, ∂c[v] = Σ_{i∈v} g_i;
- Embedding  y = W[idx]:   ∂W[v] = Σ over v's tokens of g at row idx (padding row 0);
- Conv2d (groups=1, zero padding):   ∂W[v] = the weight gradient of v's samples alone, all V
  at once as one grouped convolution, ∂c[v] = Σ g_i;
- GhostBatchNorm (per-group statistics, groups of b = one worker each)
  y = x̂ ⊙ w + c:   ∂w[v] = Σ_{i∈v} g_i ⊙ x̂_i, ∂c[v] = Σ_{i∈v} g_i, with x̂
  recomputed from x by the module's own group statistics.
Extra dimensions (sequence or spatial positions) are summed with the samples. A module called
several times (a shared layer) adds the rows of every call; a Linear, LayerNorm or Embedding
has its calls joined first, as if each worker had calls·b samples (one batched matmul).

A noise-scale step on exact averaging needs only Σ_w |∂θ[w]|² beside the summed gradient:
`fused_square_norms` takes both from the same pass, a Linear weight's share from two K×K Gram
matrices a worker (K its samples and positions) instead of its [out, in] rows when they are the
smaller: on an MLP of 3.2M parameters at W=16, ~1.15x a fused step against ~8x with the rows.

When: every module that holds parameters is one of these stock classes. A model
can still break the premise (a parameter also used outside its module, as a tied
output head is; samples not along dim 0 of a module's input), so the first call
also runs the vmap path and compares the rows per worker; a mismatch turns the
rule path off for the run and vmap's rows stand. `GradComputer.vmap` uses this.
"""

import torch
from torch import nn
from torch.nn import functional as F

from scaledrill.nn.ghost_bn import GhostBatchNorm

RULED = (nn.Linear, nn.LayerNorm, nn.Embedding, nn.Conv2d, GhostBatchNorm)
PER_SAMPLE = (nn.Linear, nn.LayerNorm, nn.Embedding)  # rules that see each sample alone: calls can be joined
# Agreement with vmap on the first call, per parameter: |rule - vmap| <= RTOL·max|vmap| + ATOL.
# Rounding differs between the two (other summation orders); a wrong premise differs by O(1).
RTOL, ATOL = 1e-3, 1e-12  # common practice for "same up to float rounding" at float32


def rule_cause(model: nn.Module) -> str | None:
    """Why the rule path cannot serve `model` (None: it can, pending the first-call comparison)."""
    for name, m in model.named_modules():
        if not any(True for _ in m.parameters(recurse=False)):
            continue
        if type(m) not in RULED:
            return f"{name or 'the model'} ({type(m).__name__}) has no per-worker rule"
        if isinstance(m, nn.Embedding) and (m.max_norm is not None or m.scale_grad_by_freq or m.sparse):
            return f"{name} (Embedding) uses max_norm, scale_grad_by_freq or sparse"
        if isinstance(m, nn.Conv2d) and (m.groups != 1 or m.padding_mode != "zeros" or isinstance(m.padding, str)):
            return f"{name} (Conv2d) uses groups, a padding mode or a named padding"
    return None


def _linear(m: nn.Linear, x, g, V):
    xs, gs = x.reshape(V, -1, x.shape[-1]), g.reshape(V, -1, g.shape[-1])
    rows = {"weight": torch.bmm(gs.transpose(1, 2), xs)}
    if m.bias is not None:
        rows["bias"] = gs.sum(1)
    return rows


def _layer_norm(m: nn.LayerNorm, x, g, V):
    shape = tuple(m.normalized_shape)
    gs = g.reshape(V, -1, *shape)
    rows = {}
    if m.weight is not None:
        normed = F.layer_norm(x, shape, None, None, m.eps)
        rows["weight"] = (gs * normed.reshape(V, -1, *shape)).sum(1)
    if m.bias is not None:
        rows["bias"] = gs.sum(1)
    return rows


def _embedding(m: nn.Embedding, idx, g, V):
    num, dim = m.num_embeddings, m.embedding_dim
    ids = idx.reshape(V, -1)
    flat = (ids + num * torch.arange(V, device=ids.device).unsqueeze(1)).reshape(-1)
    rows = torch.zeros(V * num, dim, dtype=g.dtype).index_add_(0, flat, g.reshape(-1, dim)).view(V, num, dim)
    if m.padding_idx is not None:
        rows[:, m.padding_idx] = 0
    return {"weight": rows}


def _conv2d(m: nn.Conv2d, x, g, V):
    """The V workers as the groups of one grouped convolution's weight gradient (what vmap
    does for a batched convolution weight; 3-5x faster here than unfold and a matmul)."""
    N, C, O = x.shape[0], x.shape[1], g.shape[1]
    xs = x.reshape(V, -1, *x.shape[1:]).transpose(0, 1).reshape(N // V, V * C, *x.shape[2:])
    gs = g.reshape(V, -1, *g.shape[1:]).transpose(0, 1).reshape(N // V, V * O, *g.shape[2:])
    weight = m.weight.detach().repeat(V, 1, 1, 1)  # its shape tells the kernel the groups' weight shape
    _, rows, _ = torch.ops.aten.convolution_backward(gs, xs, weight, None, m.stride, m.padding, m.dilation, False,
                                                     [0, 0], V, [False, True, False])
    out = {"weight": rows.view(V, *m.weight.shape)}
    if m.bias is not None:
        out["bias"] = g.reshape(V, -1, O, g.shape[2:].numel()).sum(dim=(1, 3))
    return out


def _ghost_batch_norm(m: GhostBatchNorm, x, g, V):
    if m.collective is not None or not m.training:
        raise ValueError("GhostBatchNorm with global statistics or in eval mode has no per-worker rule")
    if (x.shape[0] // V) % (m.group_size or x.shape[0]):
        raise ValueError(f"GhostBatchNorm groups of {m.group_size} samples span several workers")
    C = m.num_features
    normed = m.normalized(x).reshape(V, -1, C, x[0].numel() // C)
    gs = g.reshape(V, -1, C, normed.shape[-1])
    return {"weight": (gs * normed).sum(dim=(1, 3)), "bias": gs.sum(dim=(1, 3))}


RULES = {nn.Linear: _linear, nn.LayerNorm: _layer_norm, nn.Embedding: _embedding, nn.Conv2d: _conv2d,
         GhostBatchNorm: _ghost_batch_norm}


class RuleRows:
    """The [V, n] rows of one process by the rules above; `slots` map each parameter to its flat range."""

    def __init__(self, model: nn.Module, params: list[torch.Tensor], V: int):
        self.V = V
        where, offset = {}, 0
        for p in params:
            where[id(p)] = (offset, p.numel())
            offset += p.numel()
        self.numel = offset
        self.params = list(params)
        self.where = where  # parameter id -> (start, size) in the flat vector
        self.index = {id(p): i for i, p in enumerate(self.params)}
        self.modules = [m for m in model.modules() if type(m) in RULES and any(True for _ in m.parameters(recurse=False))]
        self.slots = {id(m): {k: where[id(p)] for k, p in m.named_parameters(recurse=False)} for m in self.modules}
        self.all_slots = list(where.values())

    def _passes(self, forward_sum, micro: list[dict], wrt=lambda calls: []):
        """Per micro-batch, one fused forward and backward: yields the scaled loss sum, its gradients
        with respect to the tensors `wrt(calls)` names (None where unused) and (module, input, output
        gradient) of every call of a ruled module, a shared module's calls joined (`_joined`)."""
        for batch in micro:
            calls = []

            def save(module, inputs, output):
                calls.append((module, inputs[0], output))

            handles = [m.register_forward_hook(save) for m in self.modules]
            try:
                value = forward_sum(batch)
            finally:
                for h in handles:
                    h.remove()
            n = batch["input"].shape[0]
            if any(x.shape[0] != n or y.shape[0] != n for _, x, y in calls):
                raise ValueError("a ruled module saw an input whose dim 0 is not the samples")
            wanted = wrt(calls)
            grads = torch.autograd.grad(value, [*wanted, *(y for _, _, y in calls)], allow_unused=True)
            yield value, grads[: len(wanted)], self._joined(calls, grads[len(wanted) :])

    def compute(self, model, forward_sum, micro: list[dict], dtype) -> tuple[torch.Tensor, float]:
        """Rows [V, n] and the summed loss; `forward_sum(batch)` runs the model and returns the scaled loss sum."""
        out = torch.empty(self.V, self.numel, dtype=dtype)
        written: set[tuple[int, int]] = set()  # slots of the parameters that have rows so far
        total = 0.0
        for value, _, joined in self._passes(forward_sum, micro):
            for module, x, g in joined:
                for key, rows in RULES[type(module)](module, x, g, self.V).items():
                    slot = start, size = self.slots[id(module)][key]
                    target = out[:, start : start + size]
                    if slot in written:
                        target += rows.reshape(self.V, size)
                    else:  # a parameter's first rows are copied: no zero fill to add them to
                        target.copy_(rows.reshape(self.V, size))
                        written.add(slot)
            total += float(value.detach())
        for start, size in set(self.all_slots) - written:  # a parameter no call reached has zero rows
            out[:, start : start + size].zero_()
        return out, total

    def fused_square_norms(self, forward_sum, micro: list[dict], views: list[torch.Tensor]) -> tuple[float, float]:
        """The process's summed gradient, into `views` (one per parameter), and Σ over its workers of
        |g_w|², from the same one pass per micro-batch: what a noise-scale step needs on exact
        averaging. Returns (summed loss, Σ_w |g_w|²). The premise is the rows' (checked against
        vmap by the caller first).

        A Linear whose Gram matrices are smaller than its weight's rows (`_by_gram`) has its summed
        gradient from autograd and its norms from the Gram matrices; every other module its rows,
        summed over the workers for the gradient and squared for the norms."""
        total, gram, rows = 0.0, {}, {}
        chosen: list[nn.Module] = []
        asked: list[torch.Tensor] | None = None

        def wrt(calls):  # chosen on the first micro-batch, kept for the others
            nonlocal asked
            if asked is None:
                chosen.extend(self._by_gram(calls, len(micro)))
                asked = [p for m in chosen for p in m.parameters(recurse=False)]
            return asked

        for k, (value, grads, joined) in enumerate(self._passes(forward_sum, micro, wrt)):
            for p, d in zip(asked, grads):
                view = views[self.index[id(p)]]
                d = torch.zeros_like(p) if d is None else d
                if k == 0:
                    view.copy_(d)
                else:
                    view.add_(d)
            for module, x, g in joined:
                if module in chosen:
                    gram.setdefault(id(module), []).append((module, x, g))
                    continue
                for key, part in RULES[type(module)](module, x, g, self.V).items():
                    slot = self.slots[id(module)][key]
                    rows[slot] = _wide(part) if slot not in rows else rows[slot] + part
            total += float(value.detach())
        square = torch.zeros(self.V, dtype=torch.float64)
        for group in gram.values():
            square += self._square_norms(group[0][0], self._join(group))
        for part in rows.values():
            square += part.reshape(self.V, -1).double().square().sum(1)
        from_autograd = {id(p) for p in asked or []}
        for p, view in zip(self.params, views):
            slot = self.where[id(p)]
            if slot in rows:
                view.copy_(rows[slot].sum(0).reshape(view.shape))
            elif id(p) not in from_autograd:  # a parameter no call reached
                view.zero_()
        return total, float(square.sum())

    def _by_gram(self, calls: list, micro_count: int) -> list[nn.Module]:
        """The Linear modules whose weight's per-worker norms are cheaper from K×K Gram matrices
        (K: a worker's samples and positions over every call and micro-batch) than from its
        [out, in] rows: K·(in + out) < in·out."""
        K: dict[nn.Module, int] = {}
        for module, x, _ in calls:
            if isinstance(module, nn.Linear):
                K[module] = K.get(module, 0) + x.numel() // x.shape[-1] // self.V * micro_count
        return [m for m, k in K.items() if k * (m.in_features + m.out_features) < m.in_features * m.out_features]

    def _square_norms(self, module: nn.Module, parts: list) -> torch.Tensor:
        """[V]: each worker's squared gradient norm over a chosen Linear's parameters. Its weight's
        |Σ_{i∈w} g_i x_iᵀ|² is Σ_ij (g_i·g_j)(x_i·x_j): two K×K Gram matrices a worker. Calls that
        could not be joined (inputs of several shapes) fall back to the rows."""
        V = self.V
        if isinstance(module, nn.Linear) and len(parts) == 1:
            xs, gs = (_wide(t.reshape(V, -1, t.shape[-1])) for t in parts[0])
            gram = torch.bmm(gs, gs.transpose(1, 2)).mul_(torch.bmm(xs, xs.transpose(1, 2)))
            square = gram.sum((1, 2)).double()
            return square + gs.sum(1).square().sum(1).double() if module.bias is not None else square
        sums: dict[str, torch.Tensor] = {}  # the rows of each parameter, summed over the parts
        for x, g in parts:
            for key, part in RULES[type(module)](module, x, g, V).items():
                sums[key] = _wide(part) if key not in sums else sums[key] + part
        return sum(part.reshape(V, -1).double().square().sum(1) for part in sums.values())

    def _join(self, group: list) -> list:
        """[(x, g)] of one module's calls over the micro-batches: one pair when they can be joined."""
        same_shape = len({tuple(x.shape[1:]) for _, x, _ in group}) == 1
        if len(group) == 1 or not isinstance(group[0][0], PER_SAMPLE) or not same_shape:
            return [(x, g) for _, x, g in group]
        V = self.V
        x = torch.cat([x.reshape(V, -1, *x.shape[1:]) for _, x, _ in group], dim=1).flatten(0, 1)
        g = torch.cat([g.reshape(V, -1, *g.shape[1:]) for _, _, g in group], dim=1).flatten(0, 1)
        return [(x, g)]

    def _joined(self, calls: list, outs: tuple) -> list:
        """(module, x, g) per module: the calls of a shared per-sample module joined into one,
        each worker's samples of every call side by side, so one batched matmul with K = calls·b
        replaces a matmul per call and the adding up of their rows."""
        by_module: dict[int, list] = {}
        for (module, x, _), g in zip(calls, outs):
            if g is not None:
                by_module.setdefault(id(module), []).append((module, x.detach(), g))
        return [(group[0][0], x, g) for group in by_module.values() for x, g in self._join(group)]


def _wide(t: torch.Tensor) -> torch.Tensor:
    """At least float32: squared norms of 16-bit gradients under autocast keep their digits."""
    return t.to(torch.promote_types(t.dtype, torch.float32))


def agree(rule: torch.Tensor, reference: torch.Tensor, params: list[torch.Tensor]) -> bool:
    """Do the rule's rows match the reference rows, parameter by parameter, up to rounding?"""
    offset = 0
    for p in params:
        a, b = rule[:, offset : offset + p.numel()], reference[:, offset : offset + p.numel()]
        offset += p.numel()
        if p.numel() and float((a - b).abs().max()) > RTOL * float(b.abs().max()) + ATOL:
            return False
    return True
