"""Counter-based random numbers: the draw for sample i is a pure function of (seed, stream, i).

A sequential generator gives sample i a value that depends on how many draws came
before it, so a worker taking indices [8, 16) would see other numbers than the
whole batch [0, 64) sliced at [8, 16). Hashing the counter instead makes every
take chunk-invariant and layout-invariant: the same index gives the same vector on
any process, in any batch, in any order.

The hash is splitmix64's output function (Steele, Lea, Flood 2014, "Fast
splittable pseudorandom number generators"), done in torch int64: additions and
multiplications wrap modulo 2**64 and logical right shifts are arithmetic shifts
with the sign bits masked off. Column j of row i hashes (key(seed, stream), i, j),
so a draw of `dim` columns is a prefix of a draw of more columns. Normals come from
two uniforms per value by the Box-Muller transform.
"""

import math

import torch

_GOLDEN = 0x9E3779B97F4A7C15
_MUL1 = 0xBF58476D1CE4E5B9
_MUL2 = 0x94D049BB133111EB
_MASK = (1 << 64) - 1


def _signed(value: int) -> int:
    """The int64 with the same 64 bits as the unsigned `value`."""
    value &= _MASK
    return value - (1 << 64) if value >> 63 else value


def _shr(x: torch.Tensor, bits: int) -> torch.Tensor:
    """Logical (unsigned) right shift of int64 bits."""
    return (x >> bits) & ((1 << (64 - bits)) - 1)


def mix(x: torch.Tensor) -> torch.Tensor:
    """splitmix64 on int64 tensors: add the golden gamma, then the output mix."""
    z = x + _signed(_GOLDEN)
    z = (z ^ _shr(z, 30)) * _signed(_MUL1)
    z = (z ^ _shr(z, 27)) * _signed(_MUL2)
    return z ^ _shr(z, 31)


def mix_int(x: int) -> int:
    """The same function on Python integers (exact unsigned 64-bit arithmetic)."""
    z = (x + _GOLDEN) & _MASK
    z = ((z ^ (z >> 30)) * _MUL1) & _MASK
    z = ((z ^ (z >> 27)) * _MUL2) & _MASK
    return z ^ (z >> 31)


def _bits(seed: int, index: torch.Tensor, columns: int, stream: int) -> torch.Tensor:
    """64 random bits per (index, column) as int64, shape [n, columns]."""
    if index.dtype != torch.int64:
        raise TypeError(f"index must be int64, got {index.dtype}")
    key = _signed(mix_int(mix_int(seed & _MASK) ^ (stream & _MASK)))
    row = mix(index.reshape(-1, 1) ^ key)
    col = torch.arange(1, columns + 1, dtype=torch.int64) * _signed(_GOLDEN)
    return mix(row + col)


def _unit(bits: torch.Tensor) -> torch.Tensor:
    """The top 53 bits as a float64 in [0, 1)."""
    return _shr(bits, 11).to(torch.float64) * 2.0**-53


def hashed_uniform(seed: int, index: torch.Tensor, dim: int, stream: int = 0, dtype=torch.float32) -> torch.Tensor:
    """Uniform [0, 1) values, [n, dim]; row r depends only on (seed, stream, index[r])."""
    return _unit(_bits(seed, index, dim, stream)).to(dtype)


def hashed_normal(seed: int, index: torch.Tensor, dim: int, stream: int = 0, dtype=torch.float32) -> torch.Tensor:
    """Standard normal values, [n, dim]; row r depends only on (seed, stream, index[r])."""
    u = _unit(_bits(seed, index, 2 * dim, stream))
    radius = torch.sqrt(-2.0 * torch.log1p(-u[:, 0::2]))  # 1 - u lies in (0, 1]
    return (radius * torch.cos(2.0 * math.pi * u[:, 1::2])).to(dtype)
