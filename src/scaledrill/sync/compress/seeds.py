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


class _Hash:
    """hashmix with its advancing constant (arrays wrap modulo 2^32)."""

    def __init__(self):
        self.const = INIT_A

    def __call__(self, v: np.ndarray) -> np.ndarray:
        v = v ^ U32(self.const)
        self.const = (self.const * MULT_A) & MASK32
        v = v * U32(self.const)
        return v ^ (v >> U32(16))


def _mix(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    r = U32(MIX_L) * x - U32(MIX_R) * y
    return r ^ (r >> U32(16))


def mix_rows(prefix: tuple[int, ...], last) -> list[int]:
    """[mix(*prefix, w) for w in last], in one pass; every w must be < 2**32."""
    last = np.asarray(last, dtype=np.uint64)
    if last.size and int(last.max()) > MASK32:
        return [mix(*prefix, int(w)) for w in last]  # a second word per row: not worth vectorising
    entropy = [np.full(last.shape, w, dtype=U32) for p in prefix for w in _words(int(p))] + [last.astype(U32)]  # 1.
    hashmix, zero = _Hash(), np.zeros(last.shape, dtype=U32)
    pool = [hashmix(entropy[i] if i < len(entropy) else zero) for i in range(POOL)]  # 2.
    for src in range(POOL):  # 3.
        for dst in range(POOL):
            if src != dst:
                pool[dst] = _mix(pool[dst], hashmix(pool[src]))
    for src in range(POOL, len(entropy)):
        for dst in range(POOL):
            pool[dst] = _mix(pool[dst], hashmix(entropy[src]))
    out, const = [], INIT_B  # 4.
    for i in range(2):
        v = pool[i % POOL] ^ U32(const)
        const = (const * MULT_B) & MASK32
        v = v * U32(const)
        out.append((v ^ (v >> U32(16))).astype(np.uint64))
    return (((out[1] << np.uint64(32)) | out[0]) >> np.uint64(1)).tolist()
