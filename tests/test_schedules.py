"""Schedules against hand-computed values. Exact float comparisons where the arithmetic is
exact in binary; rel 1e-12 where a cosine or power is involved."""

import math

import pytest
from omegaconf import OmegaConf

from scaledrill.optim.schedules import Schedule, milestones_of, warmup, warmup_steps_of


def test_warmup_is_linear_from_start_to_one():
    assert [warmup(s, 10, 0.1) for s in (0, 5, 10, 11)] == pytest.approx([0.1, 0.55, 1.0, 1.0], rel=1e-12)
    assert warmup(3, 0, 0.0) == 1.0  # no warmup


def test_constant_after_warmup():
    s = Schedule("constant", warmup_steps=4, warmup_start=0.0, total_steps=20)
    assert [s.factor(i) for i in (0, 1, 2, 4, 19)] == [0.0, 0.25, 0.5, 1.0, 1.0]


def test_cosine_hand_values():
    s = Schedule("cosine", warmup_steps=10, warmup_start=0.0, total_steps=110, final_factor=0.1)
    assert s.factor(10) == 1.0
    assert s.factor(60) == pytest.approx(0.55, rel=1e-12)  # t = 1/2: 0.1 + 0.9·½
    assert s.factor(35) == pytest.approx(0.1 + 0.45 * (1 + math.sqrt(0.5)), rel=1e-12)  # t = 1/4
    assert s.factor(110) == pytest.approx(0.1, rel=1e-12) and s.factor(500) == pytest.approx(0.1, rel=1e-12)


@pytest.mark.parametrize("power, expected", [(1.0, 0.5), (2.0, 0.25), (0.5, math.sqrt(0.5))])
def test_polynomial_hand_values(power, expected):
    s = Schedule("polynomial", warmup_steps=10, warmup_start=0.0, total_steps=110, power=power)
    assert s.factor(60) == pytest.approx(expected, rel=1e-12)  # t = 1/2: (1 − t)^power
    assert s.factor(110) == 0.0


def test_step_decay_and_warmup_multiply():
    s = Schedule("step", warmup_steps=10, warmup_start=0.1, total_steps=100, milestones=(3, 30, 60), gamma=0.1)
    assert s.factor(2) == pytest.approx(0.1 + 0.9 * 0.2, rel=1e-12)
    assert s.factor(5) == pytest.approx(0.55 * 0.1, rel=1e-12)  # in warmup and past the first milestone
    assert [s.factor(i) for i in (29, 30, 59, 60, 99)] == pytest.approx([0.1, 0.01, 0.01, 0.001, 0.001], rel=1e-12)


def test_milestones_as_fractions_or_steps():
    assert milestones_of(OmegaConf.create({"milestones": [0.5, 0.25]}), 200) == (50, 100)
    assert milestones_of(OmegaConf.create({"milestones": [120, 30]}), 200) == (30, 120)


def test_warmup_epochs_convert_to_the_nearest_step():
    assert warmup_steps_of(OmegaConf.create({"warmup_epochs": 5}), 156) == 780
    assert warmup_steps_of(OmegaConf.create({"warmup_epochs": 2.5, "warmup_steps": 0}), 14.3) == 36  # 35.75
    assert warmup_steps_of(OmegaConf.create({"warmup_epochs": None, "warmup_steps": 7}), None) == 7
