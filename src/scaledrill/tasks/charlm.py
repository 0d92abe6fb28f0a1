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

import math

import torch
from torch import nn

from scaledrill.errors import ConfigError, is_whole
from scaledrill.tasks.digits import TensorSet

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
        if not is_whole(vocab) or vocab < 3:
            raise ConfigError("task.data.vocab", "must be a whole number >= 3 (pad, start and a symbol)", vocab)
        if not 1 <= min_len <= max_len:
            raise ConfigError("task.data.min_len", f"must satisfy 1 <= min_len <= max_len={max_len}", min_len)
        for key, value in (("train_size", train_size), ("test_size", test_size)):
            if not is_whole(value) or value < 1:
                raise ConfigError(f"task.data.{key}", "must be a positive whole number", value)
        self.vocab, self.max_len = vocab, max_len
        gen = torch.Generator().manual_seed(seed)
        self.probs = transition_matrix(vocab, sharpness, gen)
        whole = generate(train_size + test_size, vocab, min_len, max_len, self.probs, gen)
        self.train = TensorSet({k: v[:train_size] for k, v in whole.items()})
        self.test = TensorSet({k: v[train_size:] for k, v in whole.items()})


# A tiny decoder-only transformer for the character task, written to run under vmap.
#
# Token plus learned position embeddings, `layers` pre-LayerNorm blocks of causal
# self-attention and a 4x MLP, a final LayerNorm and an output head tied to the
# token embedding. Attention is plain matmuls with a causal mask built from the
# sequence length, so it has no in-place ops and no data-dependent control flow
# (nn.MultiheadAttention does not run under torch.func.vmap with batched buffers).


class CausalSelfAttention(nn.Module):
    def __init__(self, d_model: int, heads: int):
        super().__init__()
        if d_model % heads:
            raise ValueError(f"d_model={d_model} must be a multiple of heads={heads}")
        self.heads = heads
        self.qkv = nn.Linear(d_model, 3 * d_model)
        self.out = nn.Linear(d_model, d_model)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        n, t, d = x.shape
        q, k, v = self.qkv(x).view(n, t, 3, self.heads, d // self.heads).permute(2, 0, 3, 1, 4)
        scores = q @ k.transpose(-2, -1) / math.sqrt(d // self.heads)  # [n, heads, t, t]
        future = torch.ones(t, t, dtype=torch.bool, device=x.device).triu(1)
        scores = scores.masked_fill(future, float("-inf"))
        y = scores.softmax(-1) @ v  # [n, heads, t, d/heads]
        return self.out(y.transpose(1, 2).reshape(n, t, d))


class Block(nn.Module):
    def __init__(self, d_model: int, heads: int):
        super().__init__()
        self.ln1, self.ln2 = nn.LayerNorm(d_model), nn.LayerNorm(d_model)
        self.attn = CausalSelfAttention(d_model, heads)
        self.mlp = nn.Sequential(nn.Linear(d_model, 4 * d_model), nn.GELU(), nn.Linear(4 * d_model, d_model))

    def forward(self, x):
        x = x + self.attn(self.ln1(x))
        return x + self.mlp(self.ln2(x))


class TinyTransformer(nn.Module):
    def __init__(self, vocab: int, d_model: int = 32, heads: int = 2, layers: int = 2, max_len: int = 32):
        super().__init__()
        self.max_len = max_len
        self.tokens = nn.Embedding(vocab, d_model)
        self.positions = nn.Embedding(max_len, d_model)
        self.blocks = nn.Sequential(*[Block(d_model, heads) for _ in range(layers)])
        self.ln = nn.LayerNorm(d_model)
        nn.init.normal_(self.tokens.weight, std=0.02)
        nn.init.normal_(self.positions.weight, std=0.02)

    def forward(self, tokens: torch.Tensor) -> torch.Tensor:
        """tokens: int64 [N, T] with T <= max_len -> logits [N, T, vocab]."""
        t = tokens.shape[-1]
        if t > self.max_len:
            raise ValueError(f"sequence length {t} exceeds max_len={self.max_len}")
        x = self.tokens(tokens) + self.positions(torch.arange(t, device=tokens.device))
        x = self.ln(self.blocks(x))
        return x @ self.tokens.weight.T  # head tied to the token embedding
