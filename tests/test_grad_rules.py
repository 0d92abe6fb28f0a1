"""Per-worker gradient rows from one fused backward (train/rows.py) against plain autograd per worker.

The reference is independent of the engine: for each worker, torch.autograd.grad of
its own samples' scaled loss on the same model. Float64, so the rows agree to
rounding (1e-10 relative); a wrong grouping of samples would differ by O(1).
"""

import pytest
import torch
from torch import nn

from scaledrill.nn.ghost_bn import GhostBatchNorm
from scaledrill.tasks.losses import MSESum
from scaledrill.train.grads import GradComputer

V, B = 4, 3  # workers, samples per worker


def reference_rows(model, loss, batch, scale):
    rows = []
    for v in range(V):
        part = {k: t[v * B : (v + 1) * B] for k, t in batch.items()}
        params = list(model.parameters())
        grads = torch.autograd.grad(loss(model(part["input"]), part) * scale, params, allow_unused=True)
        rows.append(torch.cat([(torch.zeros_like(p) if g is None else g).reshape(-1) for p, g in zip(params, grads)]))
    return torch.stack(rows)


def assert_rows(got, want):
    assert got.shape == want.shape
    assert float((got - want).abs().max()) <= 1e-10 * float(want.abs().max())


class SharedSequenceNet(nn.Module):
    """Tokens -> Embedding -> one Linear applied twice (shared) with LayerNorm -> mean over positions -> Linear."""

    def __init__(self, vocab=7, d=5, out=2):
        super().__init__()
        self.tokens = nn.Embedding(vocab, d, padding_idx=0)
        self.shared = nn.Linear(d, d)
        self.norm = nn.LayerNorm(d)
        self.head = nn.Linear(d, out)

    def forward(self, idx):
        x = self.tokens(idx)
        x = torch.tanh(self.norm(self.shared(x)))
        x = torch.tanh(self.shared(x))
        return self.head(x.mean(1))


class UnevenSharedNet(nn.Module):
    """A shared Linear and LayerNorm called three times, the last call on a sequence (its calls
    cannot all be joined), and a Linear the forward never calls (its rows are zero)."""

    def __init__(self, d=4):
        super().__init__()
        self.shared, self.norm = nn.Linear(d, d), nn.LayerNorm(d)
        self.unused = nn.Linear(d, d)
        self.head = nn.Linear(d, 2)

    def forward(self, x):
        h = torch.tanh(self.norm(self.shared(x)))
        h = torch.tanh(self.norm(self.shared(h)))
        seq = torch.tanh(self.shared(torch.stack([h, x], dim=1))).mean(1)
        return self.head(h + seq)


class TiedNet(nn.Module):
    """The output head reuses the embedding matrix outside the Embedding module: no rule can see that use."""

    def __init__(self, vocab=7, d=5):
        super().__init__()
        self.tokens = nn.Embedding(vocab, d)
        self.mix = nn.Linear(d, d)

    def forward(self, idx):
        return (torch.tanh(self.mix(self.tokens(idx))) @ self.tokens.weight.T).mean(1)[:, :2]


def batches(make_input, out_dim, seed):
    gen = torch.Generator().manual_seed(seed)
    x = make_input(gen)
    return [{"input": x, "target": torch.randn(V * B, out_dim, generator=gen, dtype=torch.float64),
             "index": torch.arange(V * B)}]


def run_twice(model, make_input, out_dim):
    """First call (checked against vmap) and a second call (rules alone, if kept), each against the reference."""
    model = model.double()
    computer = GradComputer(model, MSESum(), V)
    kept = []
    for seed in (1, 2):
        micro = batches(make_input, out_dim, seed)
        got = computer.compute(micro, 0.5, "vmap")
        assert_rows(got.local, reference_rows(model, MSESum(), micro[0], 0.5))
        kept.append(computer.rules is not None)
    return computer, kept


def test_linear_relu_layernorm_rows_match_each_workers_own_gradient():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 8), nn.ReLU(), nn.LayerNorm(8), nn.Linear(8, 3))
    computer, kept = run_twice(model, lambda g: torch.randn(V * B, 6, generator=g, dtype=torch.float64), 3)
    assert computer.rule_cause is None and kept == [True, True]  # the second call ran on the rules alone


def test_shared_layer_embedding_with_padding_and_sequence_positions():
    torch.manual_seed(0)
    computer, kept = run_twice(SharedSequenceNet(), lambda g: torch.randint(0, 7, (V * B, 4), generator=g), 2)
    assert computer.rule_cause is None and kept == [True, True]


def test_shared_calls_of_several_shapes_and_a_parameter_no_call_reaches():
    torch.manual_seed(0)
    computer, kept = run_twice(UnevenSharedNet(), lambda g: torch.randn(V * B, 4, generator=g, dtype=torch.float64), 2)
    assert computer.rule_cause is None and kept == [True, True]
    got = computer.compute(batches(lambda g: torch.randn(V * B, 4, generator=g, dtype=torch.float64), 2, 3), 0.5, "vmap")
    start, size = computer.rules.slots[id(computer.model.unused)]["weight"]
    assert torch.equal(got.local[:, start : start + size], torch.zeros(V, size, dtype=torch.float64))


def test_convolution_and_ghost_batch_norm_with_per_worker_statistics():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(2, 3, 3, padding=1), GhostBatchNorm(3, group_size=B), nn.ReLU(),
                          nn.Conv2d(3, 2, 2, stride=2, bias=False), nn.Flatten(), nn.Linear(2 * 2 * 2, 2))
    computer, kept = run_twice(model, lambda g: torch.randn(V * B, 2, 4, 4, generator=g, dtype=torch.float64), 2)
    assert computer.rule_cause is None and kept == [True, True]


def test_a_parameter_used_outside_its_module_falls_back_to_vmap_with_the_same_rows():
    torch.manual_seed(0)
    computer, kept = run_twice(TiedNet(), lambda g: torch.randint(0, 7, (V * B, 4), generator=g), 2)
    assert kept == [False, False] and "differ from vmap" in computer.rule_cause


def test_a_module_without_a_rule_keeps_vmap():
    model = nn.Sequential(nn.Conv1d(1, 2, 3), nn.Flatten(), nn.Linear(8, 2))
    computer = GradComputer(model.double(), MSESum(), V)
    assert computer.rules is None and "Conv1d" in computer.rule_cause



class TwoShapeNet(nn.Module):
    """A wide Linear called on samples and on sequences of them: the Gram route's calls cannot be
    joined (K = 18 a worker over 2 micro-batches: 18·128 < 64·64), so its norms fall back to rows."""

    def __init__(self, d=64):
        super().__init__()
        self.mix, self.head = nn.Linear(d, d), nn.Linear(d, 2)

    def forward(self, x):
        h = torch.tanh(self.mix(x))
        return self.head(h + torch.tanh(self.mix(torch.stack([h, x], dim=1))).mean(1))


def wide_mlp():
    # Its first Linear takes the Gram route: K = 3 samples x 2 micro-batches = 6 per worker, and
    # K·(16 + 16) < 16·16; its head takes the rows (6·(16 + 2) > 16·2).
    return nn.Sequential(nn.Linear(16, 16), nn.Tanh(), nn.LayerNorm(16), nn.Linear(16, 2))


@pytest.mark.parametrize("model, make_input, out_dim", [
    (wide_mlp, lambda g: torch.randn(V * B, 16, generator=g, dtype=torch.float64), 2),
    (SharedSequenceNet, lambda g: torch.randint(0, 7, (V * B, 4), generator=g), 2),
    (UnevenSharedNet, lambda g: torch.randn(V * B, 4, generator=g, dtype=torch.float64), 2),
    (lambda: nn.Sequential(nn.Conv2d(2, 3, 3, padding=1), GhostBatchNorm(3, group_size=B), nn.ReLU(), nn.Flatten(),
                           nn.Linear(3 * 4 * 4, 2)),
     lambda g: torch.randn(V * B, 2, 4, 4, generator=g, dtype=torch.float64), 2),
    (TwoShapeNet, lambda g: torch.randn(V * B, 64, generator=g, dtype=torch.float64), 2),
], ids=["gram-linear", "shared-sequence", "uneven-shared", "conv-ghost-bn", "gram-unjoined"])
def test_fused_gradient_and_each_workers_square_norm_without_rows(model, make_input, out_dim):
    """The noise step's quantities over two micro-batches: the summed gradient and Σ_w |g_w|²,
    against each worker's own gradient by plain autograd (summed over its micro-batches)."""
    torch.manual_seed(0)
    model = model().double()
    computer = GradComputer(model, MSESum(), V)
    micro = [batches(make_input, out_dim, seed)[0] for seed in (1, 2)]
    per_worker = sum(reference_rows(model, MSESum(), batch, 0.5) for batch in micro)
    flat = torch.full((computer.numel,), float("nan"), dtype=torch.float64)
    total, square = computer.rules.fused_square_norms(computer._forward_sum(0.5), micro, computer.flat.views(flat))
    assert_rows(flat.unsqueeze(0), per_worker.sum(0, keepdim=True))
    want = float(per_worker.square().sum())
    assert abs(square - want) <= 1e-10 * want
    with torch.no_grad():
        assert total == pytest.approx(sum(float(MSESum()(model(b["input"]), b)) * 0.5 for b in micro), rel=1e-12)
