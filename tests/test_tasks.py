"""The demo tasks: counter-based streams, every task's data, models under vmap, losses.

Float32 tolerances: gradients from vmap and from a per-worker autograd loop run the
same ops through different kernels (batched vs plain matmul), so they agree to
float32 rounding of reductions over a few thousand terms: rtol 1e-4, atol 1e-6.
"""

import copy
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
import torch
from hydra import compose, initialize_config_dir
from torch.func import functional_call, grad, vmap

from scaledrill.errors import ConfigError
from scaledrill.nn import set_group_size
from scaledrill.nn.keyed_random import hashed_normal, hashed_uniform, mix, mix_int
from scaledrill.tasks.base import build_task
from scaledrill.tasks.charlm import CharLMData
from scaledrill.tasks.digits import DigitsData, DigitsNet
from scaledrill.tasks.losses import TokenCrossEntropySum
from scaledrill.tasks.quadratic import NoisyQuadratic, QuadraticData, b_simple, expected_loss, spectrum, steps_to_target
from scaledrill.tasks.teacher import TeacherData

CONFIGS = Path(__file__).resolve().parents[1] / "src" / "scaledrill" / "conf"
TASKS = ["digits", "quadratic", "teacher", "charlm"]


@pytest.fixture(scope="module")
def tasks():
    with initialize_config_dir(config_dir=str(CONFIGS), version_base=None):
        nodes = {name: compose("run", overrides=[f"task={name}"]).task for name in TASKS}
    torch.manual_seed(0)
    return {name: build_task(node) for name, node in nodes.items()}


# ---- counter-based streams --------------------------------------------------------


def test_splitmix64_matches_exact_integer_arithmetic():
    # splitmix64 seeded 0 first output, from Vigna's reference splitmix64.c (from memory)
    assert mix_int(0) == 0xE220A8397B1DCDAF
    values = [0, 1, 2**40 + 7, 2**62 + 12345, -1, -(2**63)]
    got = mix(torch.tensor(values, dtype=torch.int64)).tolist()
    assert [g & (2**64 - 1) for g in got] == [mix_int(v & (2**64 - 1)) for v in values]


def test_hashed_draws_do_not_depend_on_the_other_indices():
    index = torch.arange(1000, dtype=torch.int64)
    whole = hashed_normal(7, index, 5)
    chunks = torch.cat([hashed_normal(7, part, 5) for part in index.split(37)])
    perm = torch.randperm(1000)
    assert torch.equal(whole, chunks)
    assert torch.equal(hashed_normal(7, index[perm], 5), whole[perm])
    assert torch.equal(hashed_normal(7, index, 3), whole[:, :3])  # a narrower draw is a prefix
    assert not torch.equal(hashed_normal(8, index, 5), whole)  # seed matters
    assert not torch.equal(hashed_normal(7, index, 5, stream=1), whole)  # stream matters
    assert torch.equal(hashed_uniform(7, index, 4), hashed_uniform(7, index, 4))


def test_hashed_normal_and_uniform_moments():
    n = 200_000
    z = hashed_normal(0, torch.arange(n // 4, dtype=torch.int64), 4).flatten().double()
    u = hashed_uniform(0, torch.arange(n // 4, dtype=torch.int64), 4).flatten().double()
    # 5 standard errors (two-sided normal tail 6e-7): SE of the mean 1/sqrt(n),
    # SE of the sample variance of a normal sqrt(2/n), of a uniform's mean sqrt(1/12n)
    assert abs(z.mean()) < 5 / math.sqrt(n)
    assert abs(z.var() - 1) < 5 * math.sqrt(2 / n)
    assert abs(u.mean() - 0.5) < 5 * math.sqrt(1 / (12 * n))
    assert 0.0 <= float(u.min()) and float(u.max()) < 1.0
    # Kolmogorov-Smirnov against the normal CDF (scipy.stats.kstest); p > 1e-4 fails 1 in 10^4
    assert scipy.stats.kstest(z[:20_000].numpy(), "norm").pvalue > 1e-4


# ---- every task ------------------------------------------------------------------


@pytest.mark.parametrize("name", TASKS)
def test_take_is_deterministic_and_chunk_invariant(tasks, name):
    train = tasks[name].data.train
    high = train.size if train.size is not None else 10**9
    index = torch.randperm(high)[:64] if train.size is not None else torch.randint(0, high, (64,))
    whole = train.take(index)
    again = train.take(index.clone())
    parts = [train.take(p) for p in index.split(24)]
    assert "input" in whole
    for key, value in whole.items():
        assert value.shape[0] == 64
        assert torch.equal(value, again[key])
        assert torch.equal(value, torch.cat([p[key] for p in parts]))


def _stack_buffers(model, workers):
    return {k: v.expand(workers, *v.shape).clone() for k, v in model.named_buffers()}


@pytest.mark.parametrize("name", TASKS)
def test_vmap_grad_equals_a_per_worker_autograd_loop(tasks, name):
    task = tasks[name]
    model, loss = copy.deepcopy(task.model).train(), task.loss
    V, b = 3, 4
    batch = task.data.train.take(torch.arange(V * b, dtype=torch.int64) * 5)
    count = sum(loss.count({k: v[w * b:(w + 1) * b] for k, v in batch.items()}) for w in range(V))
    per_worker = {k: v.view(V, b, *v.shape[1:]) for k, v in batch.items()}
    params = {k: v.detach() for k, v in model.named_parameters()}
    buffers = _stack_buffers(model, V)

    def f(p, buf, micro):
        return loss(functional_call(model, (p, buf), (micro["input"],)), micro) / count

    grads = vmap(grad(f), in_dims=(None, 0, 0))(params, buffers, per_worker)
    for w in range(V):
        replica = copy.deepcopy(model)
        micro = {k: v[w] for k, v in per_worker.items()}
        (loss(replica(micro["input"]), micro) / count).backward()
        for k, p in replica.named_parameters():
            torch.testing.assert_close(grads[k][w], p.grad, rtol=1e-4, atol=1e-6)
        for k, buf in replica.named_buffers():  # running statistics updated per worker
            torch.testing.assert_close(buffers[k][w], buf, rtol=1e-5, atol=1e-6)


def test_fused_ghost_batches_equal_per_worker_digits_outputs(tasks):
    model = copy.deepcopy(tasks["digits"].model).train()
    x = tasks["digits"].data.train.take(torch.arange(24))["input"]
    per_worker = torch.cat([copy.deepcopy(model)(part) for part in x.split(8)])
    set_group_size(model, 8)
    torch.testing.assert_close(model(x), per_worker, rtol=1e-5, atol=1e-5)
    set_group_size(model, None)
    assert (model(x) - per_worker).abs().max() > 1e-3  # one group of 24 differs


# ---- digits ----------------------------------------------------------------------


def test_digits_split_is_stratified_and_scaled():
    data = DigitsData()
    assert (data.train.size, data.test.size) == (1437, 360)  # 1797 images in the UCI set
    images = data.train.tensors["input"]
    assert images.shape[1:] == (1, 8, 8) and images.dtype == torch.float32
    assert float(images.max()) == 1.0 and float(images.min()) == 0.0
    counts = torch.bincount(data.test.tensors["target"], minlength=10)
    assert int(counts.min()) >= 35 and int(counts.max()) <= 37  # ~ 20% of ~180 per class
    assert torch.equal(DigitsData().test.tensors["target"], data.test.tensors["target"])
    with pytest.raises(ConfigError, match="task.data.test_fraction"):
        DigitsData(test_fraction=1.5)


def test_digits_net_reaches_90_percent_with_a_plain_torch_loop():
    data = DigitsData()
    torch.manual_seed(0)
    model = DigitsNet()
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    x, y = data.train.tensors["input"], data.train.tensors["target"]
    for _ in range(6):
        for idx in torch.randperm(len(y)).split(32):
            opt.zero_grad()
            torch.nn.functional.cross_entropy(model(x[idx]), y[idx]).backward()
            opt.step()
    model.eval()
    with torch.no_grad():
        accuracy = (model(data.test.tensors["input"]).argmax(-1) == data.test.tensors["target"]).float().mean()
    # UCI optical digits via scikit-learn; >= 90% for a small CNN is common practice
    assert accuracy >= 0.90, float(accuracy)


# ---- noisy quadratic ---------------------------------------------------------------


def test_quadratic_evaluate_is_the_exact_noiseless_loss(tasks):
    task = tasks["quadratic"]
    harmonic_100 = sum(1.0 / i for i in range(1, 101))
    assert task.data.evaluate(task.model)["loss"] == pytest.approx(0.5 * harmonic_100, rel=1e-6)
    assert task.data.train.size is None
    n = 20_000
    xi = task.data.train.take(torch.arange(n))["input"]
    # per-coordinate noise variance c_i = 1/i; 5 SE of a normal's variance, sqrt(2/n) relative
    torch.testing.assert_close(xi.var(0).double() / spectrum(100)[1], torch.ones(100, dtype=torch.float64),
                               atol=5 * math.sqrt(2 / n), rtol=0)


def test_closed_form_matches_monte_carlo_sgd_with_the_model():
    dim, lr, B, R = 10, 0.5, 4, 4000
    data = QuadraticData(dim=dim, theta0=1.0, seed=3)
    model = NoisyQuadratic(dim, 1.0)
    buffers = dict(model.named_buffers())
    theta = {"theta": model.theta.detach().expand(R, dim).clone()}
    mean_grad = vmap(grad(lambda p, xi: functional_call(model, (p, buffers), (xi,)).mean()))
    checks = {0: None, 5: None, 20: None, 60: None}
    for t in range(61):
        if t in checks:
            checks[t] = 0.5 * (data.h * theta["theta"].double().square()).sum(1)
        index = torch.arange(t * R * B, (t + 1) * R * B, dtype=torch.int64)
        xi = data.train.take(index)["input"].view(R, B, dim)
        theta = {"theta": theta["theta"] - lr * mean_grad(theta, xi)["theta"]}
    for t, losses in checks.items():
        predicted = expected_loss(data.h, data.c, 1.0, lr, B, t)  # closed form, Zhang et al. 2019
        se = float(losses.std()) / math.sqrt(R) + 1e-12
        # 4 Monte-Carlo standard errors (two-sided 6e-5 per check under the normal approximation)
        assert abs(float(losses.mean()) - predicted) < 4 * se, (t, float(losses.mean()), predicted, se)
    floor = expected_loss(data.h, data.c, 1.0, lr, B, 10**6)
    assert floor == pytest.approx(0.5 * sum(lr * c / (B * (2 - lr * h)) for h, c in zip(data.h, data.c)))


def test_steps_to_target_is_the_first_step_below_target():
    h, c = spectrum(20)
    for theta0, target in ((1.0, 0.5), (0.01, 0.02), (1.0, 1e-3)):
        losses = expected_loss(h, c, theta0, 0.5, 8, np.arange(20_000))
        below = np.nonzero(losses <= target)[0]
        brute = int(below[0]) if below.size else None
        assert steps_to_target(h, c, theta0, 0.5, 8, target) == brute, (theta0, target)
    assert steps_to_target(h, c, 1.0, 0.5, 8, 1e-3) is None  # below the noise floor 0.5·Σ αc/(B(2−αh))
    assert steps_to_target(h, c, 1.0, 2.5, 8, 0.1) is None  # α·h_1 > 2 diverges
    assert steps_to_target(h, c, 1.0, 0.5, 8, 100.0) == 0


def test_b_simple_is_trace_of_noise_over_squared_gradient():
    # McCandlish et al. 2018: B_simple = tr(Σ)/|G|²; h = c = (1, 1/2), θ = 1: 1.5 / 1.25
    assert b_simple([1.0, 0.5], [1.0, 0.5], 1.0) == pytest.approx(1.2)


# ---- teacher ---------------------------------------------------------------------


def test_teacher_targets_and_disjoint_test_set():
    data = TeacherData(noise=0.5, test_size=256, seed=1)
    train = data.train.take(torch.arange(20_000))
    residual = train["target"] - data.teacher(train["input"])
    # label noise std 0.5: 5 SE of a normal's variance, relative sqrt(2/n), n = 160k values
    assert abs(float(residual.var()) / 0.25 - 1) < 5 * math.sqrt(2 / residual.numel())
    assert float(data.teacher(train["input"]).std()) > 0.3  # the teacher's outputs are not trivial
    test = data.test.take(torch.arange(256))["input"]
    assert data.test.size == 256 and not torch.isclose(test, train["input"][:256]).all(1).any()


# ---- charlm ----------------------------------------------------------------------


def test_token_normalisation_differs_from_mean_of_sequence_means():
    # hand-built logits over 2 symbols, target 0: CE = log(1 + exp(l1 - l0)) = L when l1 = log(expm1(L))
    token_loss = torch.tensor([[2.0, 9.0, 9.0], [1.0, 1.0, 1.0]])
    mask = torch.tensor([[True, False, False], [True, True, True]])
    logits = torch.stack([torch.zeros(2, 3), torch.log(torch.expm1(token_loss))], -1)
    batch = {"target": torch.zeros(2, 3, dtype=torch.int64), "mask": mask}
    loss = TokenCrossEntropySum()
    per_token = loss(logits, batch) / loss.count(batch)
    per_sequence = torch.stack([loss(logits[i:i + 1], {k: v[i:i + 1] for k, v in batch.items()}) / mask[i].sum()
                                for i in range(2)]).mean()
    assert float(per_token) == pytest.approx((2.0 + 3 * 1.0) / 4)  # 1.25: every valid token weighs the same
    assert float(per_sequence) == pytest.approx((2.0 + 1.0) / 2)  # 1.50: the short sequence over-weighted


def test_charlm_sums_are_partition_invariant_and_means_are_not(tasks):
    task = tasks["charlm"]
    batch = task.data.train.take(torch.arange(16))
    lengths = batch["mask"].sum(1)
    assert int(lengths.min()) < int(lengths.max())  # variable lengths in the corpus
    with torch.no_grad():
        out = task.model(batch["input"])
    halves = [({k: v[s] for k, v in batch.items()}, out[s]) for s in (slice(0, 5), slice(5, 16))]
    whole = task.loss(out, batch) / task.loss.count(batch)
    summed = sum(task.loss(o, b) for b, o in halves) / sum(task.loss.count(b) for b, o in halves)
    mean_of_means = sum(task.loss(o, b) / task.loss.count(b) for b, o in halves) / 2
    torch.testing.assert_close(summed, whole, rtol=1e-6, atol=0)
    assert abs(float(mean_of_means - whole)) > 1e-4, (float(whole), float(mean_of_means))


def test_charlm_corpus_is_learnable_and_masked():
    data = CharLMData(train_size=64, test_size=8, seed=2)
    b = data.train.take(torch.arange(64))
    shifted = b["mask"][:, 1:]  # input position t + 1 holds the target of position t
    assert torch.equal(b["input"][:, 1:][shifted], b["target"][:, :-1][shifted])
    assert int(b["target"][~b["mask"]].abs().sum()) == 0 and bool((b["target"][b["mask"]] >= 2).all())
    rate = -(data.probs * data.probs.clamp_min(1e-300).log()).sum(1)[2:].mean()
    assert float(rate) < 0.8 * math.log(30)  # the chain is more predictable than uniform over 30 symbols
