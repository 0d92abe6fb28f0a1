"""A tiny decoder-only transformer for the character task, written to run under vmap.

Token plus learned position embeddings, `layers` pre-LayerNorm blocks of causal
self-attention and a 4x MLP, a final LayerNorm and an output head tied to the
token embedding. Attention is plain matmuls with a causal mask built from the
sequence length, so it has no in-place ops and no data-dependent control flow
(nn.MultiheadAttention does not run under torch.func.vmap with batched buffers).
"""

import math

import torch
from torch import nn


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
