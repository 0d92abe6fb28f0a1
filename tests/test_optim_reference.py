"""LARS and LAMB step for step against optax's `lars` and `lamb`, in float64.

The problem: a tree of three leaves (a 3×4 matrix, a bias vector of 3, a scalar),
gradients H ⊙ w plus seeded noise so every step differs, and a learning rate that
changes every step (as a schedule would). Both sides get the same gradients.
Tolerance 1e-10 relative: float64 rounding over a dozen steps of a few flops per
entry is ~1e-15; the margin covers differing summation order in the norms.
"""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
import torch
from omegaconf import OmegaConf

from scaledrill.optim import build_optimizer, set_lr

STEPS = 12
NAMES = ("layer.weight", "layer.bias", "scale")
ADAPTED = {"layer.weight": True, "layer.bias": False, "scale": False}  # the default rule: ndim <= 1 excluded


def lr_at(step):
    return 0.05 * (1 + step) / STEPS


def problem():
    rng = np.random.default_rng(7)
    params = {"layer.weight": rng.normal(size=(3, 4)), "layer.bias": rng.normal(size=3), "scale": np.array(1.3)}
    curv = {k: rng.uniform(0.5, 3.0, size=v.shape) for k, v in params.items()}
    noise = [{k: 0.3 * rng.normal(size=v.shape) for k, v in params.items()} for _ in range(STEPS)]
    return params, curv, noise


def run_ours(optim: dict):
    params, curv, noise = problem()
    named = [(k, torch.nn.Parameter(torch.tensor(params[k], dtype=torch.float64))) for k in NAMES]
    opt = build_optimizer(named, OmegaConf.create(optim))
    ratios = []
    for t in range(STEPS):
        for k, p in named:
            p.grad = torch.tensor(curv[k] * p.detach().numpy() + noise[t][k])
        set_lr(opt, lr_at(t))
        opt.step()
        ratios.append(dict(opt.trust_ratios))
    return {k: p.detach().numpy() for k, p in named}, ratios


def run_optax(tx):
    params, curv, noise = problem()
    with jax.enable_x64(True):
        p = {k: jnp.asarray(v, dtype=jnp.float64) for k, v in params.items()}
        state = tx.init(p)
        for t in range(STEPS):
            g = {k: curv[k] * p[k] + noise[t][k] for k in NAMES}
            updates, state = tx.update(g, state, p)
            p = optax.apply_updates(p, updates)
        return {k: np.asarray(v) for k, v in p.items()}


def assert_same(ours, theirs):
    for k in NAMES:
        np.testing.assert_allclose(ours[k], theirs[k], rtol=1e-10, atol=1e-12, err_msg=k)


LARS = dict(name="lars", lr=0.1, momentum=0.9, weight_decay=0.01, trust_coefficient=0.02,
            denominator="update", trust_cap=None)


@pytest.mark.parametrize("exclude", [None, []])
def test_lars_matches_optax(exclude):
    ours, _ = run_ours({**LARS, "exclude": exclude})
    mask = ADAPTED if exclude is None else {k: True for k in NAMES}
    # reference: optax.lars (weight decay, trust ratio ‖w‖/‖g+βw‖, −lr, momentum trace)
    theirs = run_optax(optax.lars(lr_at, weight_decay=0.01, weight_decay_mask=mask, trust_coefficient=0.02,
                                  eps=0.0, trust_ratio_mask=mask, momentum=0.9))
    start, _, _ = problem()
    assert np.abs(ours["layer.weight"] - start["layer.weight"]).max() > 1e-3  # it moved
    assert_same(ours, theirs)


LAMB = dict(name="lamb", lr=0.01, betas=[0.9, 0.99], eps=1e-6, weight_decay=0.05, decay="decoupled",
            bias_correction=True, trust_cap=None)


def test_lamb_matches_optax_lamb_with_nothing_excluded():
    ours, _ = run_ours({**LAMB, "exclude": []})
    # reference: optax.lamb decays and trust-scales every leaf
    theirs = run_optax(optax.lamb(lr_at, b1=0.9, b2=0.99, eps=1e-6, weight_decay=0.05))
    assert_same(ours, theirs)


def test_lamb_matches_optax_chain_with_default_exclusions():
    ours, _ = run_ours({**LAMB, "exclude": None})
    # reference: optax.lamb's own chain with the trust ratio masked like the weight decay
    tx = optax.chain(
        optax.scale_by_adam(b1=0.9, b2=0.99, eps=1e-6),
        optax.add_decayed_weights(0.05, mask=ADAPTED),
        optax.masked(optax.scale_by_trust_ratio(), ADAPTED),
        optax.scale_by_learning_rate(lr_at),
    )
    assert_same(ours, run_optax(tx))


def test_lamb_coupled_decay_matches_optax_chain():
    ours, _ = run_ours({**LAMB, "decay": "coupled", "exclude": None})
    # reference: optax pieces, L2 added to the gradient before the Adam moments
    tx = optax.chain(
        optax.add_decayed_weights(0.05, mask=ADAPTED),
        optax.scale_by_adam(b1=0.9, b2=0.99, eps=1e-6),
        optax.masked(optax.scale_by_trust_ratio(), ADAPTED),
        optax.scale_by_learning_rate(lr_at),
    )
    assert_same(ours, run_optax(tx))


def test_trust_ratios_are_reported_by_name_for_adapted_parameters_only():
    _, ratios = run_ours({**LARS, "exclude": None})
    assert set(ratios[-1]) == {"layer.weight"}
    params, curv, noise = problem()
    w = params["layer.weight"]
    u = curv["layer.weight"] * w + noise[0]["layer.weight"] + 0.01 * w
    # hand formula of step 0: η‖w‖/‖g + βw‖ (You et al. 2017, the update form)
    assert ratios[0]["layer.weight"] == pytest.approx(0.02 * np.linalg.norm(w) / np.linalg.norm(u), rel=1e-12)
