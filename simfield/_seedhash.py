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


@numba.njit(cache=True, nogil=True)
def pcg64_words(entropy):
    # numpy's SeedSequence: a pool of 4 uint32 words mixed from the assembled entropy
    # (run entropy padded to 4 words, then the spawn key), then generate_state(4,
    # uint64). uint32 arithmetic in int64 masked to 32 bits.
    m = np.int64(0xFFFFFFFF)
    ha, mult_a = np.int64(0x43b0d7e5), np.int64(0x931e8875)
    mult_b = np.int64(0x58f38ded)
    mix_l, mix_r = np.int64(0xca01f9dd), np.int64(0x4973f715)
    pool = np.zeros(4, np.int64)
    for i in range(4):
        v = entropy[i] if i < entropy.size else np.int64(0)
        v = (v ^ ha) & m
        ha = (ha * mult_a) & m
        v = (v * ha) & m
        pool[i] = v ^ (v >> 16)
    for s in range(4):
        for d in range(4):
            if s != d:
                v = (pool[s] ^ ha) & m
                ha = (ha * mult_a) & m
                v = (v * ha) & m
                v ^= v >> 16
                r = (mix_l * pool[d] - mix_r * v) & m
                pool[d] = r ^ (r >> 16)
    for s in range(4, entropy.size):
        for d in range(4):
            v = (entropy[s] ^ ha) & m
            ha = (ha * mult_a) & m
            v = (v * ha) & m
            v ^= v >> 16
            r = (mix_l * pool[d] - mix_r * v) & m
            pool[d] = r ^ (r >> 16)
    hb = np.int64(0x8b51f9dd)
    half = np.zeros(8, np.int64)
    for i in range(8):
        v = (pool[i % 4] ^ hb) & m
        hb = (hb * mult_b) & m
        v = (v * hb) & m
        half[i] = v ^ (v >> 16)
    out = np.zeros(4, np.int64)
    for i in range(4):  # little-endian pairs of uint32 words
        out[i] = half[2 * i] | (half[2 * i + 1] << 32)
    return out.view(np.uint64)
