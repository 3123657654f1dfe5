"""Named random streams: numpy's SeedSequence + PCG64, number for number.

simfield.random makes PCG64's seed words with a compiled copy of numpy's SeedSequence hash
(for speed); the reference here is numpy's own SeedSequence (the library), for seeds and spawn
keys of one and of several 32-bit words.
"""

import zlib

import numpy as np
import pytest

from simfield.random import pcg64_seed_words, spawn_key, stream


def test_seed_words_are_numpys_seed_sequence():
    rng = np.random.default_rng(5)
    for t in range(600):
        seed = (int(rng.integers(0, 50)), int(rng.integers(0, 2 ** 32)),
                int(rng.integers(0, 2 ** 62)))[t % 3]
        hi = 2 ** 32 if t % 2 else 2 ** 40  # keys of one word, and of two
        keys = tuple(int(k) for k in rng.integers(0, hi, rng.integers(0, 8)))
        ref = np.random.SeedSequence(seed, spawn_key=keys).generate_state(4, np.uint64)
        np.testing.assert_array_equal(pcg64_seed_words(seed, keys), ref)


def test_streams_draw_numpys_numbers():
    names = ("exposure", "b17", 2, "read", 4, 5)
    keys = tuple(zlib.crc32(n.encode()) if isinstance(n, str) else n for n in names)
    assert spawn_key(*names) == keys
    ref = np.random.Generator(np.random.PCG64(np.random.SeedSequence(3, spawn_key=keys)))
    got = stream(3, *names)
    np.testing.assert_array_equal(got.standard_normal(1000), ref.standard_normal(1000))
    np.testing.assert_array_equal(got.poisson(3.5, 100), ref.poisson(3.5, 100))
    # no names: the seed alone, as np.random.default_rng(seed)
    np.testing.assert_array_equal(stream(11).random(10), np.random.default_rng(11).random(10))


def test_negative_seed_is_refused_as_numpy_refuses_it():
    with pytest.raises(ValueError):
        stream(-1, "population")
