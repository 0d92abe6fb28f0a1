"""One process: each compressor's declared property, wire bytes, config rules, state."""

import io
import math

import pytest
import torch

from scaledrill.dist import LocalCollective
from scaledrill.errors import ConfigError
from scaledrill.layout import Layout
from scaledrill.config.rules import check_sync
from scaledrill.sync import build_sync
from scaledrill.sync.buckets import bounds, bucketed_sum
from scaledrill.sync.compress import NAMES, Round, build
from scaledrill.sync.feedback import ErrorFeedback

SHAPES = [torch.Size([20, 30]), torch.Size([30])]  # n = 630
N = 630


def local_round(step, V, seed=0):
    """A Round for V workers in one process: sums are plain row sums."""
    total = lambda t: t.sum(0)  # noqa: E731
    return Round(step, range(V), V, seed, total, lambda t, in_place=False: t.sum(0) / V)


def layer(cfg, W=4, shapes=SHAPES, dtype=torch.float64):
    cfg = {"error_feedback": False, "exact_until": 0, **cfg}  # one compressor on its own, from step 0
    return build_sync(cfg, Layout(W, 1, 1, 1, "local"), shapes, LocalCollective(), seed=3, dtype=dtype)


def test_topk_keeps_exactly_the_k_largest_magnitudes():
    x = torch.randn(3, N, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    out, _ = build({"name": "topk", "count": 17}).update(x, None, local_round(0, 3))
    for v in range(3):
        kept = out.sent[v].nonzero().flatten()
        want = x[v].abs().argsort(descending=True)[:17]
        assert set(kept.tolist()) == set(want.tolist())
        assert torch.equal(out.sent[v, kept], x[v, kept])  # kept values travel unchanged


def test_unbiased_randk_mean_error_vanishes():
    # Stich et al. 2018: scaling kept entries by n/k makes E[C(x)] = x.
    x = torch.linspace(-2, 3, 50, dtype=torch.float64).add(0.01)[None]
    comp, draws = build({"name": "randk", "count": 5, "unbiased": True}), 4000
    total = torch.zeros(50, dtype=torch.float64)
    for step in range(draws):
        total += comp.update(x, None, local_round(step, 1))[0].sent[0]
    # Each draw has per-entry variance x²(n/k − 1) = 9x²; z = 4.5 on 50 entries
    # leaves a false-failure chance below 50·7e-6 (normal tail).
    z = (total / draws - x[0]).abs() / (3 * x[0].abs() / math.sqrt(draws))
    assert z.max() < 4.5


def test_qsgd_is_unbiased_with_the_papers_variance():
    # Alistarh et al. 2017, Lemma 3.1: E[Q(v)] = v; per entry Var = ‖v‖²·p(1−p)/s², p the rounding fraction.
    x = torch.tensor([[0.3, -1.2, 0.05, 2.0, -0.7, 0.0, 1.1, -0.01]], dtype=torch.float64)
    s, draws = 2, 4000
    comp = build({"name": "qsgd", "levels": s})
    outs = torch.stack([comp.update(x, None, local_round(t, 1))[0].sent[0] for t in range(draws)])
    norm = x.norm()
    r = x[0].abs() / norm * s
    p = r - r.floor()
    std = norm * (p * (1 - p)).sqrt() / s
    moving = std > 0
    z = (outs.mean(0) - x[0]).abs()[moving] / (std[moving] / math.sqrt(draws))
    assert z.max() < 4.5  # normal tail, 8 entries: false-failure chance < 1e-4
    assert torch.equal(outs[:, ~moving], x[0, ~moving].expand(draws, -1))  # no spread where p = 0
    assert torch.allclose(outs.var(0), std.square(), rtol=0.15)  # sample variance of 4000 draws: ~2.2 % std error


@pytest.mark.parametrize("name", NAMES)
def test_error_feedback_loses_nothing(name):
    # Stich et al. 2018 / Karimireddy et al. 2019: Σ transmitted + final residual = Σ inputs.
    comp = ErrorFeedback(build({"name": name, "fraction": 0.05, "levels": 2, "rank": 1, "exact_until": 0}))
    V, gen = 3, torch.Generator().manual_seed(7)
    state = comp.init(SHAPES, V, 0, torch.float64)
    fed = torch.zeros(V, N, dtype=torch.float64)
    sent = torch.zeros_like(fed)
    for step in range(25):
        g = torch.randn(V, N, generator=gen, dtype=torch.float64)
        out, state = comp.update(g, state, local_round(step, V))
        fed += g
        sent += out.sent
    residual = state.worker_residual
    if name == "exact":
        assert residual.abs().max() == 0
    else:
        assert residual.abs().max() > 1e-5  # the compressor really dropped something
    # float64 telescoping sum of 25 steps: error ~ 25 · 2.2e-16 · largest magnitude; 1e-13 of it
    # leaves a wide margin (unbiased random-k with feedback grows the residual to ~1e8).
    scale = float(sent.abs().max()) + 1.0
    torch.testing.assert_close(sent + residual, fed, rtol=0, atol=1e-13 * scale)


def _stack(V, rows, cols, r, seed):
    gen = torch.Generator().manual_seed(seed)
    a = torch.randn(rows, r, generator=gen, dtype=torch.float64)
    return torch.stack([(a @ torch.randn(r, cols, generator=gen, dtype=torch.float64)) for _ in range(V)])


@pytest.mark.parametrize("rank,true_rank", [(1, 1), (3, 2), (3, 3)])
def test_powersgd_is_exact_when_rank_covers_the_matrix(rank, true_rank):
    # Vogels et al. 2019: with r ≥ rank(M) one power step recovers M (span(MQ) = span(M)).
    shapes = [torch.Size([12, 10]), torch.Size([10])]
    m = _stack(4, 12, 10, true_rank, seed=true_rank)
    x = torch.cat([m.reshape(4, -1), torch.randn(4, 10, dtype=torch.float64)], dim=1)
    lay = layer({"name": "powersgd", "rank": rank}, W=4, shapes=shapes)
    out = lay.reduce(x, range(4), 0)
    assert lay.stats["wire_bytes_per_worker"] < lay.stats["uncompressed_bytes"]  # it did compress
    torch.testing.assert_close(out, x.mean(0), rtol=0, atol=1e-12)  # float64 rounding of 120-entry products


def test_powersgd_rank_one_is_lossy_on_a_full_rank_matrix():
    x = torch.randn(4, 130, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    lay = layer({"name": "powersgd", "rank": 1}, W=4, shapes=[torch.Size([12, 10]), torch.Size([10])])
    lay.reduce(x, range(4), 0)
    assert lay.stats["rel_error_to_exact"] > 0.3


@pytest.mark.parametrize(
    "cfg,wire",
    [
        ({"name": "exact"}, 630 * 4),  # 630 float32 values
        ({"name": "fp16"}, 630 * 2),  # 630 halves
        ({"name": "bf16"}, 630 * 2),
        ({"name": "topk", "fraction": 0.1}, 63 * (4 + 4)),  # k = 63 values + 63 int32 indices
        ({"name": "randk", "fraction": 0.1}, 63 * 4),  # values only; indices come from the seed
        ({"name": "sign"}, 79 + 4),  # ceil(630/8) bytes of signs + one float32 scale
        ({"name": "qsgd", "levels": 16}, 473 + 4),  # 630·(1 sign + 5 level bits)/8 = 472.5 -> 473, + norm
        ({"name": "powersgd", "rank": 2}, (2 * (20 + 30) + 30) * 4),  # P 20×2, Q 30×2, bias 30 as is
        ({"name": "powersgd", "rank": 12}, 630 * 4),  # 12·50 = 600 ≥ 600: the matrix goes uncompressed
    ],
)
def test_wire_bytes_worked_examples(cfg, wire):
    lay = layer(cfg, dtype=torch.float32)
    x = torch.randn(4, N)
    lay.reduce(x if lay.per_worker else x.sum(0, keepdim=True), range(4), 0)
    assert lay.stats["wire_bytes_per_worker"] == wire
    assert lay.stats["uncompressed_bytes"] == 2520
    assert lay.stats["compression_ratio"] == pytest.approx(2520 / wire, rel=1e-12)


@pytest.mark.parametrize(
    "key,value",
    [
        ("name", "zip"),
        ("fraction", 0.0),
        ("fraction", 1.5),
        ("levels", 0),
        ("rank", 0),
        ("bucket_kib", 0),
        ("exact_until", -1),
        ("count", 0),
        ("error_feedback", "yes"),
        ("min_saving", -1.0),
        ("bogus", 1),
    ],
)
def test_bad_values_name_their_key(key, value):
    with pytest.raises(ConfigError) as err:
        check_sync({"name": "topk", key: value})
    assert err.value.key == f"sync.{key}"


def test_exact_uses_the_fused_sum_and_fidelity_is_perfect():
    lay = layer({"name": "exact"}, W=4, dtype=torch.float32)
    x = torch.randn(4, N)
    assert not lay.per_worker
    out = lay.reduce(x.sum(0, keepdim=True), range(4), 0)
    assert torch.equal(out, x.sum(0) / 4)
    assert lay.stats["rel_error_to_exact"] == 0.0
    assert lay.stats["cosine_to_exact"] == pytest.approx(1.0, abs=1e-12)  # float64 rounding of the cosine


def test_residual_norm_is_the_root_of_all_workers_squares():
    lay = layer({"name": "topk", "count": 10, "error_feedback": True}, W=4)
    x = torch.randn(4, N, dtype=torch.float64)
    lay.reduce(x, range(4), 0)
    res = lay.state_dict()["worker.residual"]
    assert lay.stats["residual_norm"] == pytest.approx(float(res.norm()), rel=1e-12)


@pytest.mark.parametrize("cfg", [{"name": "powersgd", "rank": 2, "error_feedback": True}, {"name": "qsgd", "error_feedback": True}])
def test_state_survives_a_save_and_load(cfg):
    gen = torch.Generator().manual_seed(5)
    grads = [torch.randn(4, N, generator=gen, dtype=torch.float64) for _ in range(6)]
    straight = layer(cfg)
    want = [straight.reduce(g, range(4), t) for t, g in enumerate(grads)]
    first = layer(cfg)
    for t in range(3):
        first.reduce(grads[t], range(4), t)
    buf = io.BytesIO()
    torch.save(first.state_dict(), buf)
    buf.seek(0)
    second = layer(cfg)
    second.load_state_dict(torch.load(buf, weights_only=True))
    got = [second.reduce(grads[t], range(4), t) for t in range(3, 6)]
    for a, b in zip(got, want[3:]):
        assert torch.equal(a, b)  # same arithmetic in the same order: bit-identical


class Doubling:
    """Two identical processes: every all-reduce doubles; records bucket sizes."""

    size = 2

    def __init__(self):
        self.sizes = []

    def all_reduce(self, t):
        self.sizes.append(t.numel())
        t.mul_(2)

    def all_reduce_many(self, tensors):
        for t in tensors:
            self.all_reduce(t)


def test_buckets_cover_the_vector_within_the_cap():
    assert bounds(10, 4, 16 / 2**10) == [slice(0, 4), slice(4, 8), slice(8, 10)]  # 16 B = 4 floats per bucket
    coll = Doubling()
    rows = torch.arange(30.0).reshape(3, 10)
    out = bucketed_sum(rows, coll, 16 / 2**10)
    assert coll.sizes == [4, 4, 2]
    assert torch.equal(out, rows.sum(0) * 2)


def test_a_donated_row_is_averaged_in_place_and_error_feedback_never_donates_its_own():
    x = torch.randn(1, N, generator=torch.Generator().manual_seed(5), dtype=torch.float64)
    want = x[0] / 4  # W = 4 workers, one row: the fused path's per-process sum
    kept = layer({"name": "exact"}).reduce(x.clone(), range(4), 0)
    donated = x.clone()
    out = layer({"name": "exact"}).reduce(donated, range(4), 0, donate=True)
    assert out.data_ptr() == donated.data_ptr()  # no copy of the vector
    assert torch.equal(out, want) and torch.equal(kept, want)  # ÷4 is exact in binary
    fed = layer({"name": "exact", "error_feedback": True})
    y = x.expand(4, N).clone()
    fed.reduce(y, range(4), 0, donate=True)
    assert torch.equal(y, x.expand(4, N))  # fidelity reads the caller's rows again: not donated
    assert fed.stats["residual_norm"] == 0.0  # exact leaves nothing behind


def test_row_seeds_equal_numpy_seed_sequence():
    """`mix_rows` hashes all workers at once; numpy.random.SeedSequence row by row is the reference."""
    import numpy as np

    from scaledrill.sync.compress.seeds import mix_rows

    pick = np.random.default_rng(5)
    for seed, step in [(0, 0), (3, 1), (2**32 - 1, 7), (2**40 + 5, 2**33), (2**70 + 1, 12345)]:
        workers = [0, 1, 2**32 - 1] + pick.integers(0, 2**32, size=20).tolist()
        want = [int(np.random.SeedSequence([seed, step, w]).generate_state(1, np.uint64)[0] >> 1) for w in workers]
        assert mix_rows((seed, step), workers) == want


def test_qsgd_and_randk_rows_equal_each_workers_own_computation():
    """The vectorised compressors give, to the bit, what each worker computes alone from its own stream."""
    V, levels, k = 5, 4, 9
    x = torch.randn(V, N, generator=torch.Generator().manual_seed(2))
    x[3] = 0.0  # a zero row sends zeros
    rnd = local_round(11, V, seed=4)
    qsgd, _ = build({"name": "qsgd", "levels": levels}).update(x, None, rnd)
    randk, _ = build({"name": "randk", "count": k}).update(x, None, rnd)
    for v in range(V):
        norm = x[v].norm()
        want = torch.zeros(N)
        if norm != 0:  # the formula of Alistarh et al. 2017, one worker at a time
            r = x[v].abs() / norm * levels
            u = torch.rand(N, generator=rnd.generator(v))
            want = norm * x[v].sign() * (r.floor() + (u < r - r.floor()).float()) / levels
        assert torch.equal(qsgd.sent[v], want)
        idx = torch.randperm(N, generator=rnd.generator(v))[:k]
        want = torch.zeros(N)
        want[idx] = x[v, idx] * (N / k)
        assert torch.equal(randk.sent[v], want)
