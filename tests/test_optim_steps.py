"""LARS and LAMB details optax does not have: the paper's denominator, the ratio cap,
the zero-norm fallback and LAMB without bias correction, each checked by hand."""

import math

import pytest
import torch
from omegaconf import OmegaConf

from scaledrill.optim import build_optimizer, set_lr


def one_matrix(w, g):
    p = torch.nn.Parameter(torch.tensor(w, dtype=torch.float64))
    p.grad = torch.tensor(g, dtype=torch.float64)
    return [("w", p)], p


LARS = dict(name="lars", lr=0.5, momentum=0.9, weight_decay=0.1, trust_coefficient=0.01, exclude=[])


def test_lars_paper_denominator_by_hand():
    named, p = one_matrix([[3.0, 4.0]], [[0.0, 2.0]])  # ‖w‖ = 5, ‖g‖ = 2
    opt = build_optimizer(named, OmegaConf.create({**LARS, "denominator": "grad"}))
    opt.step()
    # You et al. 2017, eq. for the local lr: η‖w‖/(‖g‖ + β‖w‖) = 0.01·5/(2 + 0.5) = 0.02
    assert opt.trust_ratios["w"] == pytest.approx(0.02, rel=1e-12)
    # w − lr·ρ·(g + βw) = [3, 4] − 0.5·0.02·[0.3, 2.4]
    assert p.detach().flatten().tolist() == pytest.approx([3 - 0.003, 4 - 0.024], rel=1e-12)


def test_lars_momentum_carries_the_scaled_update():
    named, p = one_matrix([[3.0, 4.0]], [[0.0, 0.0]])
    opt = build_optimizer(named, OmegaConf.create({**LARS, "weight_decay": 0.0}))
    opt.step()  # zero gradient: ratio falls back to 1, update 0
    assert opt.trust_ratios["w"] == 1.0 and p.detach().tolist() == [[3.0, 4.0]]
    p.grad = torch.tensor([[0.0, 2.0]], dtype=torch.float64)
    opt.step()  # ρ = 0.01·5/2 = 0.025, v = 0.5·0.025·[0, 2]
    p.grad = torch.tensor([[0.0, 0.0]], dtype=torch.float64)
    opt.step()  # ratio 1 again, v = 0.9·v
    assert p.detach()[0, 1].item() == pytest.approx(4 - 0.025 * (1 + 0.9), rel=1e-12)


def test_lars_trust_cap_caps_the_ratio():
    named, _ = one_matrix([[3.0, 4.0]], [[0.0, 1e-6]])
    opt = build_optimizer(named, OmegaConf.create({**LARS, "trust_cap": 0.3, "weight_decay": 0.0}))
    opt.step()
    assert opt.trust_ratios["w"] == 0.3  # uncapped it would be 0.01·5/1e-6 = 5e4


def test_lars_zero_weights_fall_back_to_ratio_one():
    named, p = one_matrix([[0.0, 0.0]], [[1.0, 0.0]])
    opt = build_optimizer(named, OmegaConf.create(LARS))
    opt.step()
    assert opt.trust_ratios["w"] == 1.0 and p.detach().tolist() == [[-0.5, 0.0]]


LAMB = dict(name="lamb", lr=0.1, betas=[0.9, 0.99], eps=1e-6, weight_decay=0.0, exclude=[])


def test_lamb_without_bias_correction_by_hand():
    named, p = one_matrix([[3.0, 4.0]], [[1.0, -2.0]])
    opt = build_optimizer(named, OmegaConf.create({**LAMB, "bias_correction": False}))
    opt.step()
    # m = 0.1 g, v = 0.01 g², r = m/(√v + ε) = 0.1 g/(0.1|g| + ε) ≈ sign(g); You et al. 2020, Alg. 2
    r = [0.1 / (0.1 + 1e-6), -0.2 / (0.2 + 1e-6)]
    rho = 5.0 / math.hypot(*r)
    assert opt.trust_ratios["w"] == pytest.approx(rho, rel=1e-12)
    assert p.detach().flatten().tolist() == pytest.approx([3 - 0.1 * rho * r[0], 4 - 0.1 * rho * r[1]], rel=1e-12)


def test_lamb_bias_corrected_first_step_by_hand():
    # with bias correction m̂ = g, v̂ = g², so r = g/(|g| + ε) at step 1 (You et al. 2020, Alg. 2)
    named, p = one_matrix([[3.0, 4.0]], [[1.0, -2.0]])
    opt = build_optimizer(named, OmegaConf.create({**LAMB, "bias_correction": True}))
    set_lr(opt, 0.1)
    opt.step()
    r = [1 / (1 + 1e-6), -2 / (2 + 1e-6)]
    rho = 5.0 / math.hypot(*r)
    assert p.detach().flatten().tolist() == pytest.approx([3 - 0.1 * rho * r[0], 4 - 0.1 * rho * r[1]], rel=1e-12)


def test_lamb_trust_cap_caps_the_ratio():
    named, _ = one_matrix([[300.0, 400.0]], [[1.0, -2.0]])
    opt = build_optimizer(named, OmegaConf.create({**LAMB, "trust_cap": 10.0}))
    opt.step()
    assert opt.trust_ratios["w"] == 10.0  # uncapped ≈ 500/√2 ≈ 354
