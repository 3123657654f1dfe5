"""numpy's SeedSequence hash, compiled (numba), for :func:`simfield.random.stream`.

``pcg64_words(entropy)`` is ``SeedSequence(...).generate_state(4, np.uint64)`` of the
assembled entropy words (the seed's uint32 words padded to four, then the spawn key's), the
hash of numpy's ``numpy/random/bit_generator.pyx`` (Melissa O'Neill's seed_seq design); the
tests compare it with numpy's SeedSequence word for word. Kept apart so that importing
:mod:`simfield.random` does not import numba.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["pcg64_words"]


_M32 = 0xFFFFFFFF  # uint32 arithmetic in int64, masked to 32 bits
_INIT_A, _MULT_A, _INIT_B, _MULT_B = 0x43b0d7e5, 0x931e8875, 0x8b51f9dd, 0x58f38ded
_MIX_L, _MIX_R = 0xca01f9dd, 0x4973f715


@numba.njit(cache=True, nogil=True)
def _hashmix(value, h, mult):
    """numpy's hashmix: (hashed value, the multiplier's next state)."""
    value = (value ^ h) & _M32
    h = (h * mult) & _M32
    value = (value * h) & _M32
    return value ^ (value >> 16), h


@numba.njit(cache=True, nogil=True)
def _mix(x, y):
    r = (_MIX_L * x - _MIX_R * y) & _M32
    return r ^ (r >> 16)


@numba.njit(cache=True, nogil=True)
def pcg64_words(entropy):
    # numpy's SeedSequence: a pool of 4 uint32 words mixed from the assembled entropy
    # (run entropy padded to 4 words, then the spawn key), then generate_state(4, uint64)
    h = np.int64(_INIT_A)
    pool = np.zeros(4, np.int64)
    for i in range(4):
        pool[i], h = _hashmix(entropy[i] if i < entropy.size else np.int64(0), h, _MULT_A)
    for s in range(4):
        for d in range(4):
            if s != d:
                v, h = _hashmix(pool[s], h, _MULT_A)
                pool[d] = _mix(pool[d], v)
    for s in range(4, entropy.size):
        for d in range(4):
            v, h = _hashmix(entropy[s], h, _MULT_A)
            pool[d] = _mix(pool[d], v)
    h = np.int64(_INIT_B)
    half = np.zeros(8, np.int64)
    for i in range(8):
        half[i], h = _hashmix(pool[i % 4], h, _MULT_B)
    out = np.zeros(4, np.int64)
    for i in range(4):  # little-endian pairs of uint32 words
        out[i] = half[2 * i] | (half[2 * i + 1] << 32)
    return out.view(np.uint64)
