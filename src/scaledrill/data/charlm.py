"""A character-level language-modelling task on a generated corpus (nothing downloaded).

Sequences come from a seeded random first-order Markov chain over `vocab` symbols:
symbol 0 pads, symbol 1 starts every sequence, symbols 2.. are the chain's states.
Each row of the transition matrix is a softmax of Gaussian logits with scale
`sharpness`, so the next symbol is predictable but not certain: the best possible
loss is the chain's entropy rate, well below log(vocab). Lengths are uniform on
[min_len, max_len]; a sample is input = tokens[:-1], target = tokens[1:] and
mask = the valid target positions, padded to max_len. Because lengths vary, a
loss normalised per valid token differs from a mean of per-sequence means.
"""

import torch

from ..errors import ConfigError
from .digits import TensorSet

PAD, START = 0, 1


def transition_matrix(vocab: int, sharpness: float, gen: torch.Generator) -> torch.Tensor:
    """[vocab, vocab] next-symbol probabilities; every row puts zero mass on PAD and START."""
    logits = torch.randn(vocab, vocab, generator=gen, dtype=torch.float64) * sharpness
    logits[:, :2] = float("-inf")  # never emit PAD or START inside a sequence
    return logits.softmax(-1)


def generate(count: int, vocab: int, min_len: int, max_len: int, probs: torch.Tensor,
             gen: torch.Generator) -> dict[str, torch.Tensor]:
    """`count` padded sequences as {"input", "target", "mask"}, each [count, max_len]."""
    tokens = torch.full((count, max_len + 1), PAD, dtype=torch.int64)
    tokens[:, 0] = START
    for t in range(1, max_len + 1):
        tokens[:, t] = torch.multinomial(probs[tokens[:, t - 1]], 1, generator=gen).squeeze(1)
    lengths = torch.randint(min_len, max_len + 1, (count,), generator=gen)
    mask = torch.arange(max_len) < lengths[:, None]  # target position t is valid if t < length
    return {"input": tokens[:, :-1].masked_fill(~mask, PAD), "target": tokens[:, 1:].masked_fill(~mask, PAD), "mask": mask}


class CharLMData:
    def __init__(self, vocab: int = 32, min_len: int = 4, max_len: int = 16, train_size: int = 4096,
                 test_size: int = 512, sharpness: float = 2.0, seed: int = 0):
        if not isinstance(vocab, int) or vocab < 3:
            raise ConfigError("task.data.vocab", "must be a whole number >= 3 (pad, start and a symbol)", vocab)
        if not 1 <= min_len <= max_len:
            raise ConfigError("task.data.min_len", f"must satisfy 1 <= min_len <= max_len={max_len}", min_len)
        for key, value in (("train_size", train_size), ("test_size", test_size)):
            if not isinstance(value, int) or value < 1:
                raise ConfigError(f"task.data.{key}", "must be a positive whole number", value)
        self.vocab, self.max_len = vocab, max_len
        gen = torch.Generator().manual_seed(seed)
        self.probs = transition_matrix(vocab, sharpness, gen)
        whole = generate(train_size + test_size, vocab, min_len, max_len, self.probs, gen)
        self.train = TensorSet({k: v[:train_size] for k, v in whole.items()})
        self.test = TensorSet({k: v[train_size:] for k, v in whole.items()})
