"""Seeds of the compressors' random streams, from (seed, step, global worker id).

`mix(*words)` hashes a few non-negative integers with numpy.random.SeedSequence
(NumPy's entropy pool after M. E. O'Neill's 2015 seed_seq design, from memory),
which costs ~50 µs a call. A step draws one seed per hosted worker, and 64 calls
cost more than the compression itself, so `mix_rows` runs the same hash for all
workers at once on uint32 arrays: equal to `mix(*prefix, w)` for every w
(tests/test_sync_compress.py checks it against SeedSequence).

Steps of the hash (32-bit words, products modulo 2^32):
1. the words of every integer, low 32 bits first (0 is one word);
2. fill a pool of 4 words with hashmix(word) (zeros past the entropy), the
   hash constant advancing by one multiplication per call;
3. mix every pool word into every other one, then any words past the 4th into
   every pool word;
4. draw two output words from the pool with a second hash constant and join
   them little-endian into 64 bits; drop the lowest bit (63-bit seeds).
"""

import numpy as np

INIT_A, MULT_A, INIT_B, MULT_B = 0x43B0D7E5, 0x931E8875, 0x8B51F9DD, 0x58F38DED
MIX_L, MIX_R = 0xCA01F9DD, 0x4973F715
POOL, MASK32 = 4, 0xFFFFFFFF
U32 = np.uint32


def mix(*words: int) -> int:
    """A well-spread 63-bit seed from several non-negative integers."""
    return int(np.random.SeedSequence([int(w) for w in words]).generate_state(1, np.uint64)[0] >> 1)


def _words(value: int) -> list[int]:
    out = [value & MASK32]
    value >>= 32
    while value:
        out.append(value & MASK32)
        value >>= 32
    return out


def _hash_constants(calls: int) -> tuple[np.ndarray, np.ndarray]:
    """The constant hashmix XORs with and the one it multiplies by, for its first `calls` calls, as [calls, 1] columns."""
    before, const = [], INIT_A
    for _ in range(calls):
        before.append(const)
        const = (const * MULT_A) & MASK32
    after = [(c * MULT_A) & MASK32 for c in before]
    return np.array(before, dtype=U32)[:, None], np.array(after, dtype=U32)[:, None]


XOR_BY, MUL_BY = _hash_constants(64)  # enough for 16 words of entropy


class _Hash:
    """hashmix with its advancing constant; `count` calls at once on the same words give a [count, ...] array."""

    def __init__(self):
        self.calls = 0

    def __call__(self, v: np.ndarray, count: int = 1) -> np.ndarray:
        at, self.calls = self.calls, self.calls + count
        v = (v ^ XOR_BY[at : self.calls]) * MUL_BY[at : self.calls]  # arrays wrap modulo 2^32
        return v ^ (v >> U32(16))


def _mix(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    r = U32(MIX_L) * x - U32(MIX_R) * y
    return r ^ (r >> U32(16))


def mix_rows(prefix: tuple[int, ...], last) -> list[int]:
    """[mix(*prefix, w) for w in last], in one pass; every w must be < 2**32."""
    last = np.asarray(last, dtype=np.uint64)
    words = [w for p in prefix for w in _words(int(p))]
    if (last.size and int(last.max()) > MASK32) or POOL * (POOL + len(words) + 1) > len(XOR_BY):
        return [mix(*prefix, int(w)) for w in last]  # a second word per row: not worth vectorising
    entropy = [np.full(last.shape, w, dtype=U32) for w in words] + [last.astype(U32)]  # 1.
    hashmix, zero = _Hash(), np.zeros(last.shape, dtype=U32)
    pool = np.stack([hashmix(entropy[i] if i < len(entropy) else zero)[0] for i in range(POOL)])  # 2.
    for src in range(POOL):  # 3. pool[src] stays fixed while it mixes into the other three
        others = [d for d in range(POOL) if d != src]
        pool[others] = _mix(pool[others], hashmix(pool[src], len(others)))
    for src in range(POOL, len(entropy)):
        pool = _mix(pool, hashmix(entropy[src], POOL))
    out, const = [], INIT_B  # 4.
    for i in range(2):
        v = pool[i % POOL] ^ U32(const)
        const = (const * MULT_B) & MASK32
        v = v * U32(const)
        out.append((v ^ (v >> U32(16))).astype(np.uint64))
    return (((out[1] << np.uint64(32)) | out[0]) >> np.uint64(1)).tolist()
