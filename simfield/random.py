"""Named, independent random streams derived from one integer seed.

``stream(seed, "population")`` and ``stream(seed, "exposure", "b15", 3)`` give generators that
are independent of each other and depend only on the seed and the names, never on the order in
which stages run. Nothing here touches numpy's global state.
"""

from __future__ import annotations

import zlib

import numpy as np

__all__ = ["stream", "spawn_key"]


def spawn_key(*names: str | int) -> tuple[int, ...]:
    """Stable integer key for a sequence of names (CRC-32 of strings, ints as given)."""
    return tuple(int(n) if isinstance(n, (int, np.integer)) else zlib.crc32(str(n).encode())
                 for n in names)


def stream(seed: int, *names: str | int) -> np.random.Generator:
    """Generator for the stream ``names`` under the integer ``seed``.

    Parameters
    ----------
    seed : int
        The scenario's seed (non-negative).
    *names : str or int
        Stage, band, exposure ... identifying the stream.
    """
    ss = np.random.SeedSequence(entropy=int(seed), spawn_key=spawn_key(*names))
    return np.random.Generator(np.random.PCG64(ss))
