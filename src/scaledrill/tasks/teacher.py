"""Teacher-student regression: a fixed random MLP labels Gaussian inputs.

Inputs xᵢ ~ N(0, I) come from a counter-based hash of the sample index, so the
train stream is endless and any index gives the same sample on any process. The
test set is `test_size` samples from the index range starting at 2**40, which no
run reaches. Targets are teacher(x) plus optional Gaussian label noise with
standard deviation `noise` (its own hash stream). The teacher is a ReLU MLP with
He-initialised weights drawn from `seed`, so targets have order-one scale.
"""

from dataclasses import dataclass, field

import torch

from scaledrill.errors import ConfigError, is_whole
from scaledrill.nn.keyed_random import hashed_normal
from scaledrill.tasks.digits import TensorSet
from scaledrill.tasks.mlp import MLP

TEST_OFFSET = 2**40


def make_teacher(in_dim: int, hidden: int, out_dim: int, depth: int, seed: int) -> MLP:
    teacher = MLP(in_dim, hidden, out_dim, depth)
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for layer in teacher.net:
            if isinstance(layer, torch.nn.Linear):
                fan_in = layer.weight.shape[1]
                layer.weight.copy_(torch.randn(layer.weight.shape, generator=gen) * (2.0 / fan_in) ** 0.5)
                layer.bias.zero_()
    return teacher.requires_grad_(False).eval()


@dataclass
class TeacherStream:
    teacher: MLP
    in_dim: int
    noise: float
    seed: int
    offset: int = 0
    size: int | None = field(default=None, init=False)

    def take(self, index: torch.Tensor) -> dict[str, torch.Tensor]:
        index = index + self.offset
        x = hashed_normal(self.seed, index, self.in_dim, stream=0)
        with torch.no_grad():
            y = self.teacher(x)
        if self.noise:
            y = y + self.noise * hashed_normal(self.seed, index, y.shape[1], stream=1)
        return {"input": x, "target": y}


class TeacherData:
    def __init__(self, in_dim: int = 32, hidden: int = 64, out_dim: int = 8, depth: int = 2,
                 noise: float = 0.0, test_size: int = 1024, seed: int = 0):
        for key, value in (("in_dim", in_dim), ("hidden", hidden), ("out_dim", out_dim), ("test_size", test_size)):
            if not is_whole(value) or value < 1:
                raise ConfigError(f"task.data.{key}", "must be a positive whole number", value)
        if noise < 0:
            raise ConfigError("task.data.noise", "must be >= 0", noise)
        self.teacher = make_teacher(in_dim, hidden, out_dim, depth, seed)
        self.train = TeacherStream(self.teacher, in_dim, noise, seed)
        test = TeacherStream(self.teacher, in_dim, noise, seed, offset=TEST_OFFSET)
        self.test = TensorSet(test.take(torch.arange(test_size)))
