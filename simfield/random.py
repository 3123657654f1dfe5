"""Named, independent random streams derived from one integer seed.

``stream(seed, "population")`` and ``stream(seed, "exposure", "b15", 3)`` give generators that
are independent of each other and depend only on the seed and the names, never on the order in
which stages run. Nothing here touches numpy's global state.

Each stream is numpy's ``Generator(PCG64(SeedSequence(seed, spawn_key=keys)))``, number for
number. The detector draws one stream per 128^2 block of pixels and the read noise one per
chunk of its time stream, some 30,000 per default run, and numpy's SeedSequence object costs
~9 us of the ~13 us a stream takes; :func:`stream` makes the four 64-bit words PCG64 asks of
its seed sequence with the same hash (numpy's ``SeedSequence.generate_state(4, np.uint64)``,
compiled) and hands them over in a minimal seed-sequence object, ~4 us a stream. The tests
check the words and the draws against numpy's own SeedSequence.
"""

from __future__ import annotations

import zlib
from functools import lru_cache

import numpy as np
from numpy.random.bit_generator import ISeedSequence

__all__ = ["stream", "spawn_key"]


@lru_cache(maxsize=4096)
def _crc(name: str) -> int:
    return zlib.crc32(name.encode())


def spawn_key(*names: str | int) -> tuple[int, ...]:
    """Stable integer key for a sequence of names (CRC-32 of strings, ints as given)."""
    return tuple(int(n) if isinstance(n, (int, np.integer)) else _crc(str(n)) for n in names)


def _words(n: int) -> list[int]:
    """The uint32 words numpy's SeedSequence makes of a non-negative int (low word first;
    0 is one word)."""
    if n == 0:
        return [0]
    out = []
    while n > 0:
        out.append(n & 0xFFFFFFFF)
        n >>= 32
    return out


def _hash():
    """The compiled hash (imported on first use, so importing this module stays light)."""
    from ._seedhash import pcg64_words

    return pcg64_words


class _Seeded:
    """A seed sequence that only hands PCG64 its four words (numpy's ``ISeedSequence``)."""

    __slots__ = ("_w",)

    def __init__(self, w: np.ndarray):
        self._w = w

    def generate_state(self, n_words: int, dtype=np.uint32) -> np.ndarray:
        if n_words != 4 or np.dtype(dtype) != np.uint64:  # only PCG64's request is known
            raise NotImplementedError("simfield.random: a stream's seed serves PCG64 only")
        return self._w.copy()


ISeedSequence.register(_Seeded)


def pcg64_seed_words(seed: int, keys: tuple[int, ...]) -> np.ndarray:
    """``SeedSequence(seed, spawn_key=keys).generate_state(4, np.uint64)``, compiled."""
    if seed <= 0xFFFFFFFF and all(k <= 0xFFFFFFFF for k in keys):  # one word each
        ent = [seed, 0, 0, 0, *keys] if keys else [seed]
    else:
        run = _words(seed)
        if keys and len(run) < 4:
            run += [0] * (4 - len(run))
        ent = run + [w for k in keys for w in _words(k)]
    return _hash()(np.array(ent, np.int64))


def stream(seed: int, *names: str | int) -> np.random.Generator:
    """Generator for the stream ``names`` under the integer ``seed``.

    Parameters
    ----------
    seed : int
        The scenario's seed (non-negative).
    *names : str or int
        Stage, band, exposure ... identifying the stream.
    """
    seed, keys = int(seed), spawn_key(*names)
    if seed < 0 or any(k < 0 for k in keys):  # numpy's own message
        return np.random.Generator(np.random.PCG64(
            np.random.SeedSequence(entropy=seed, spawn_key=keys)))
    return np.random.Generator(np.random.PCG64(_Seeded(pcg64_seed_words(seed, keys))))
