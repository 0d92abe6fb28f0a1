"""Cluster forecast: all-reduce cost, measured FLOPs, the step and rung projection, the config."""

import json
import math
from dataclasses import replace

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from omegaconf import OmegaConf

from conftest import composed
from scaledrill.errors import ConfigError
from scaledrill.forecast import (
    ALGORITHMS,
    CAUTION,
    Cluster,
    allreduce_seconds,
    devices_for,
    flops_per_sample,
    forecast_json,
    param_bytes,
    project_rungs,
    project_step,
    render_forecast,
    validate,
)  # fmt: skip

# ---------------------------------------------------------------- collectives

N, ALPHA, BETA, GAMMA = 1e8, 1e-5, 1e-10, 1e-11  # 100 MB; 10 µs; 10 GB/s; reduction at 100 GB/s


def test_ring_matches_patarasuk_yuan():
    # Patarasuk & Yuan 2009 / Thakur et al. 2005: 2(p−1)α + 2(p−1)/p·nβ + (p−1)/p·nγ, p = 4:
    # 2·3·1e-5 = 6e-5;  2·(3/4)·1e8·1e-10 = 0.015;  (3/4)·1e8·1e-11 = 7.5e-4;  sum 0.01581
    t = allreduce_seconds(N, 4, ALPHA, BETA, GAMMA, algorithm="ring")
    assert t == pytest.approx(0.01581, rel=1e-12)


def test_recursive_doubling_matches_thakur():
    # Thakur, Rabenseifner, Gropp 2005: lg p·(α + nβ + nγ), p = 8:
    # 3·(1e-5 + 0.01 + 0.001) = 3·0.01101 = 0.03303
    t = allreduce_seconds(N, 8, ALPHA, BETA, GAMMA, algorithm="recursive_doubling")
    assert t == pytest.approx(0.03303, rel=1e-12)
    # p = 6 is not a power of two: our simplification charges ⌈lg 6⌉ = 3 rounds, like p = 8
    assert allreduce_seconds(N, 6, ALPHA, BETA, GAMMA, algorithm="recursive_doubling") == pytest.approx(t, rel=1e-12)


def test_rabenseifner_matches_thakur():
    # Thakur et al. 2005: 2·lg p·α + 2(p−1)/p·nβ + (p−1)/p·nγ, p = 8:
    # 2·3·1e-5 = 6e-5;  2·(7/8)·0.01 = 0.0175;  (7/8)·0.001 = 8.75e-4;  sum 0.018435
    t = allreduce_seconds(N, 8, ALPHA, BETA, GAMMA, algorithm="rabenseifner")
    assert t == pytest.approx(0.018435, rel=1e-12)


def test_two_level_is_intra_ring_plus_inter_ring_on_a_shard():
    intra, inter = (2e-6, 1e-11), (1e-5, 1e-10)  # 2 µs, 100 GB/s inside; 10 µs, 10 GB/s across
    # docs/references.md "Cost of a collective": ring inside the node on n, ring across nodes on n/g; p = 16, g = 4, m = 4
    # inside: 2·3·2e-6 + 2·(3/4)·1e8·1e-11 = 1.2e-5 + 1.5e-3 = 1.512e-3
    # across: 2·3·1e-5 + 2·(3/4)·2.5e7·1e-10 = 6e-5 + 3.75e-3 = 3.81e-3;   total 5.322e-3
    t = allreduce_seconds(N, 16, algorithm="two_level", ranks_per_node=4, intra=intra, inter=inter)
    assert t == pytest.approx(5.322e-3, rel=1e-12)
    # a flat ring over all 16 at the inter-node link: 2·15·1e-5 + 2·(15/16)·0.01 = 0.01905
    assert allreduce_seconds(N, 16, *inter, algorithm="ring") == pytest.approx(0.01905, rel=1e-12)


@pytest.mark.parametrize("algorithm", ALGORITHMS)
def test_one_rank_costs_nothing(algorithm):
    t = allreduce_seconds(N, 1, ALPHA, BETA, GAMMA, algorithm, ranks_per_node=1, intra=(ALPHA, BETA), inter=(ALPHA, BETA))
    assert t == 0.0


def test_bad_collective_arguments():
    with pytest.raises(ValueError, match="unknown all-reduce algorithm"):
        allreduce_seconds(N, 4, ALPHA, BETA, algorithm="tree")
    with pytest.raises(ValueError, match="multiple of ranks_per_node"):
        allreduce_seconds(N, 10, algorithm="two_level", ranks_per_node=4, intra=(0, 1e-9), inter=(0, 1e-9))


# ---------------------------------------------------------------- FLOPs


def test_linear_layer_flops_per_sample():
    layer = torch.nn.Linear(7, 5)
    x = torch.randn(3, 7, requires_grad=True)  # as if a layer before it needed the input gradient
    f = flops_per_sample(layer, x)
    # FlopCounterMode convention 2·m·n·k per matmul (torch docs): forward 2·in·out = 70 per sample,
    # backward input gradient + weight gradient = 2·70 = 140 (exact: counted integers)
    assert f == {"forward": 70.0, "backward": 140.0, "train": 210.0}
    # the first layer of a network has no input gradient: backward is one matmul, 70
    assert flops_per_sample(layer, torch.randn(3, 7))["backward"] == 70.0
    assert layer.weight.grad is None  # the measurement leaves no gradients behind
    assert param_bytes(layer) == (7 * 5 + 5) * 4  # float32


class Block(torch.nn.Module):
    def __init__(self, d, heads):
        super().__init__()
        self.heads = heads
        self.norm1, self.norm2 = torch.nn.LayerNorm(d), torch.nn.LayerNorm(d)
        self.qkv, self.out = torch.nn.Linear(d, 3 * d, bias=False), torch.nn.Linear(d, d, bias=False)
        self.up, self.down = torch.nn.Linear(d, 4 * d, bias=False), torch.nn.Linear(4 * d, d, bias=False)

    def forward(self, x):
        b, t, d = x.shape
        q, k, v = self.qkv(self.norm1(x)).view(b, t, 3, self.heads, d // self.heads).transpose(1, 3).unbind(2)
        scores = (q @ k.transpose(-1, -2)) / math.sqrt(d // self.heads)
        causal = torch.ones(t, t, dtype=torch.bool).triu(1)
        mixed = scores.masked_fill(causal, float("-inf")).softmax(-1) @ v
        x = x + self.out(mixed.transpose(1, 2).reshape(b, t, d))
        return x + self.down(torch.nn.functional.gelu(self.up(self.norm2(x))))


class TinyCausalLM(torch.nn.Module):
    def __init__(self, vocab=64, d=32, layers=2, heads=2, ctx=16):
        super().__init__()
        self.embed, self.pos = torch.nn.Embedding(vocab, d), torch.nn.Parameter(torch.zeros(ctx, d))
        self.blocks = torch.nn.Sequential(*[Block(d, heads) for _ in range(layers)])
        self.head = torch.nn.Linear(d, vocab, bias=False)

    def forward(self, tokens):
        return self.head(self.blocks(self.embed(tokens) + self.pos[: tokens.shape[1]]))


def test_transformer_training_flops_near_six_n_per_token():
    vocab, d, layers, ctx = 64, 32, 2, 16
    model = TinyCausalLM(vocab, d, layers, ctx=ctx)
    tokens = torch.randint(0, vocab, (2, ctx))
    per_token = flops_per_sample(model, tokens)["train"] / ctx
    # N: weights of the matmuls (non-embedding, no biases or norms): 12·L·d² + d·V = 24576 + 2048
    n = sum(m.weight.numel() for m in model.modules() if isinstance(m, torch.nn.Linear))
    assert n == 12 * layers * d * d + d * vocab == 26624
    # Kaplan et al. 2020, training ≈ 6·N per token (from memory). On top, attention's two matmuls
    # (q·kᵀ and weights·v) cost 2·T·d each per token per layer forward, ×3 with the backward:
    # 12·L·T·d = 12288 here. The counter sees full T×T scores (a causal mask saves nothing), so
    # per token = 6N + 12·L·T·d exactly (our derivation from the 2·m·n·k convention).
    assert per_token == pytest.approx(6 * n + 12 * layers * ctx * d, rel=1e-12)
    # Band: 1 ≤ ratio to 6N ≤ 1.1, since 2·L·T·d / N = 0.077 at this short width; the extra
    # shrinks as d grows relative to T, which is why 6N is quoted for large models.
    assert 1.0 <= per_token / (6 * n) <= 1.1


# ---------------------------------------------------------------- the step and the rungs


def small_cluster(**changes) -> Cluster:
    base = dict(
        devices=8, devices_per_node=4, peak_tflops=100.0, utilization=0.5,
        intra_bandwidth_gbps=100.0, intra_latency_us=1.0, inter_bandwidth_gbps=10.0, inter_latency_us=10.0,
        algorithm="ring", overlap=0.5, price_per_device_hour=2.0,
    )  # fmt: skip
    return Cluster(**(base | changes))


def test_project_step_by_hand():
    step = project_step(small_cluster(), 64, flops_per_sample=1e12, grad_bytes=1e9, compression_ratio=4)
    # compute: 64/8 = 8 samples per device · 1e12 / (100e12 · 0.5) = 0.16 s
    assert step.compute_s == pytest.approx(0.16, rel=1e-12)
    # comm: ring over 8 devices on 2 nodes, so the inter link (10 µs, 10 GB/s), on 1e9/4 = 2.5e8 bytes:
    # 2·7·1e-5 + 2·(7/8)·2.5e8·1e-10 = 1.4e-4 + 0.04375 = 0.04389  (Patarasuk & Yuan 2009)
    assert step.wire_bytes == 2.5e8
    assert step.comm_s == pytest.approx(0.04389, rel=1e-12)
    # overlap rule: hidden = min(0.5 · 0.04389, ⅔ · 0.16) = 0.021945; step = 0.16 + 0.04389 − 0.021945
    assert step.hidden_s == pytest.approx(0.021945, rel=1e-12)
    assert step.step_s == pytest.approx(0.181945, rel=1e-12)
    # with full overlap and little compute, the backward caps what hides: B = 8 -> compute 0.02 s,
    # hidden = ⅔·0.02 = 0.013333..., step = 0.02 + 0.04389 − 0.013333... = 0.0505566...
    short = project_step(small_cluster(overlap=1.0), 8, 1e12, 1e9, 4)
    assert short.hidden_s == pytest.approx(0.02 * 2 / 3, rel=1e-12)
    assert short.step_s == pytest.approx(0.02 + 0.04389 - 0.02 * 2 / 3, rel=1e-12)


def test_devices_for_small_batches():
    big = small_cluster(devices=256, devices_per_node=8)
    assert [devices_for(big, b).devices for b in (3, 8, 12, 64, 1000)] == [3, 8, 8, 64, 256]
    assert devices_for(big, 3).devices_per_node == 3


def test_project_rungs_rows_and_flags():
    cluster = small_cluster(devices=256, devices_per_node=8)
    rungs = [
        {"global_batch": 8, "steps_to_target": 3000},  # 30× the steps of B = 256: B_noise ≫ 256
        {"global_batch": 256, "steps_to_target": 100},
        {"global_batch": 512, "steps_to_target": None},
    ]
    rows = project_rungs(cluster, rungs, flops_per_sample=1e10, grad_bytes=4e7)
    for row in rows[:2]:
        step = project_step(devices_for(cluster, row["global_batch"]), row["global_batch"], 1e10, 4e7)
        assert row["step_s"] == pytest.approx(step.step_s, rel=1e-12)
        assert row["time_to_target_s"] == pytest.approx(row["steps_to_target"] * step.step_s, rel=1e-12)
        assert row["device_hours"] == pytest.approx(row["devices"] * row["time_to_target_s"] / 3600, rel=1e-12)
        assert row["cost"] == pytest.approx(2.0 * row["device_hours"], rel=1e-12)
    # by hand, compute = 1e10 / (100e12 · 0.5) = 2e-4 s per step on both rungs, hidden = ⅔ · 2e-4:
    # B = 8, one node, intra ring: comm 2·7·1e-6 + 2·(7/8)·4e7·1e-11 = 7.14e-4;
    #   step 2e-4 + 7.14e-4 − 1.3333e-4 = 7.8067e-4; × 3000 = 2.342 s on 8 devices (slow, cheap)
    # B = 256, 32 nodes, inter ring: comm 2·255·1e-5 + 2·(255/256)·4e7·1e-10 = 0.01306875;
    #   step 2e-4 + 0.01306875 − 1.3333e-4 = 0.01313542; × 100 = 1.313542 s on 256 devices (fast, dear)
    assert rows[0]["time_to_target_s"] == pytest.approx(3000 * (2e-4 + 7.14e-4 - 2e-4 * 2 / 3), rel=1e-12)
    assert rows[1]["time_to_target_s"] == pytest.approx(100 * (2e-4 + 0.01306875 - 2e-4 * 2 / 3), rel=1e-12)
    assert [r["devices"] for r in rows] == [8, 256, 256]
    assert [r["cheapest"] for r in rows] == [True, False, False]
    assert [r["fastest"] for r in rows] == [False, True, False]
    assert rows[2]["time_to_target_s"] is None and rows[2]["cost"] is None


def test_forecast_document_and_table_carry_the_caution():
    cluster = validate(composed("forecast", "example"))
    rows = project_rungs(cluster, [{"global_batch": 1024, "steps_to_target": 3000}], 1e11, 5e8)
    doc = forecast_json(cluster, rows, 1e11, 5e8, None, {"flops_per_sample": "config"})
    json.loads(json.dumps(doc))  # plain JSON
    assert "not promises" in doc["caution"] and "trial on the target hardware" in doc["caution"]
    assert doc["assumptions"]["compression_ratio"] == 1.0 and doc["assumptions"]["wire_bytes"] == 5e8
    assert doc["assumptions"]["cluster"]["nodes"] == 32
    table = render_forecast(doc)
    assert table.caption == CAUTION and table.row_count == 1


# ---------------------------------------------------------------- monotonicity (hypothesis)

clusters = st.builds(
    lambda nodes, per_node, **kw: small_cluster(devices=nodes * per_node, devices_per_node=per_node, **kw),
    nodes=st.integers(1, 64), per_node=st.sampled_from([1, 2, 4, 8]),
    intra_bandwidth_gbps=st.floats(1, 1000), inter_bandwidth_gbps=st.floats(0.1, 100),
    intra_latency_us=st.floats(0, 50), inter_latency_us=st.floats(0, 50),
    algorithm=st.sampled_from(ALGORITHMS), overlap=st.floats(0, 1),
)  # fmt: skip
batches = st.integers(1, 1 << 16)
SLACK = 1 + 1e-12  # rounding only


@settings(max_examples=200, deadline=None)
@given(clusters, batches, st.floats(1, 10), st.sampled_from(["intra_bandwidth_gbps", "inter_bandwidth_gbps"]))
def test_more_bandwidth_is_never_slower(cluster, batch, factor, link):
    faster = replace(cluster, **{link: getattr(cluster, link) * factor})
    assert project_step(faster, batch, 1e9, 1e8).step_s <= project_step(cluster, batch, 1e9, 1e8).step_s * SLACK


@settings(max_examples=200, deadline=None)
@given(clusters, st.floats(0.1, 100), st.floats(1, 10))
def test_more_compression_never_more_wire_time(cluster, ratio, factor):
    loose = project_step(cluster, 256, 1e9, 1e8, ratio)
    tight = project_step(cluster, 256, 1e9, 1e8, ratio * factor)
    assert tight.comm_s <= loose.comm_s * SLACK and tight.wire_bytes <= loose.wire_bytes


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 64), st.integers(1, 64), st.sampled_from([1, 2, 4, 8]), batches)
def test_more_devices_never_more_compute(nodes_a, nodes_b, per_node, batch):
    few, many = sorted((nodes_a, nodes_b))
    small = small_cluster(devices=few * per_node, devices_per_node=per_node)
    large = small_cluster(devices=many * per_node, devices_per_node=per_node)
    assert project_step(large, batch, 1e9, 1e8).compute_s <= project_step(small, batch, 1e9, 1e8).compute_s


# ---------------------------------------------------------------- configuration


def test_example_config_is_valid():
    cluster = validate(composed("forecast", "example"))
    assert (cluster.devices, cluster.nodes, cluster.algorithm) == (256, 32, "two_level")
    # units: 25 GB/s -> β = 1/(25e9) s/byte; 15 µs -> α = 1.5e-5 s
    assert cluster.inter == pytest.approx((1.5e-5, 4e-11), rel=1e-12)


@pytest.mark.parametrize(
    "key, value",
    [
        ("intra_bandwidth_gbps", 0), ("inter_bandwidth_gbps", -25.0), ("utilization", 1.5),
        ("utilization", 0.0), ("algorithm", "tree"), ("devices", 250), ("devices", 0),
        ("overlap", 1.2), ("inter_latency_us", -1.0), ("peak_tflops", "fast"), ("price_per_device_hour", -1),
        ("devices_per_node", 2.5), ("compression_ratio", 0), ("flops_per_sample", -1.0), ("ladder", 3),
        ("grad_bytes", float("inf")),
    ],
)  # fmt: skip
def test_bad_cluster_names_the_key(key, value):
    node = composed("forecast", "example")
    node[key] = value
    with pytest.raises(ConfigError) as caught:
        validate(node)
    assert caught.value.key == f"forecast.{key}"


def test_missing_and_unknown_keys_are_named():
    node = composed("forecast", "example")
    node.devices = "???"
    with pytest.raises(ConfigError, match="forecast.devices: is required"):
        validate(node)
    node = OmegaConf.to_container(composed("forecast", "example")) | {"bandwith_gbps": 10}
    with pytest.raises(ConfigError, match="forecast.bandwith_gbps: is not a forecast setting"):
        validate(node)
