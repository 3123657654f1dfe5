"""Readout order of a multi-channel infrared array: which output reads a pixel, and when.

The detector is cut into ``n_channels`` vertical strips of equal width w = ceil(nx / n),
each read by its own output. Every output reads its strip row by row from row 0 up; along a
row the fast direction alternates from one output to the next (even outputs read columns
left to right, odd outputs right to left), and after each row the clock spends
``row_overhead_pix`` pixel times before the next row (the line overhead). So pixel (y, x) of
output c is read at sample

    t = y (w + overhead) + u,   u = x - c w (c even) or (c + 1) w - 1 - x (c odd),

in units of the pixel time dt (``pixel_time_us``). All outputs are read at the same time, so a
noise common to the outputs appears at the same u in every strip, mirrored in the odd ones.
This is the layout of the multi-output arrays described by Rauscher et al. (2015, PASP 127,
1144) [from memory: 4 outputs of 512 columns on a 2048-pixel array, 10 us per pixel, alternating
fast-scan directions]; the numbers here are the project's own defaults (common practice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["ReadoutLayout"]


@dataclass(frozen=True)
class ReadoutLayout:
    """Channels and read times of a detector of ``shape`` (ny, nx) pixels.

    Attributes
    ----------
    shape : (ny, nx)
    n_channels : int
    overhead : int (pixel times)
        Line overhead after every row.
    dt_s : float (s)
        Pixel time.
    """

    shape: tuple
    n_channels: int
    overhead: int
    dt_s: float

    @property
    def width(self) -> int:
        """Columns per channel (the last channel may hold fewer real pixels)."""
        return math.ceil(self.shape[1] / self.n_channels)

    @property
    def row_len(self) -> int:
        """Samples per row of one channel, pixels plus overhead."""
        return self.width + self.overhead

    @property
    def n_samples(self) -> int:
        """Samples in one channel's read of the whole detector."""
        return self.shape[0] * self.row_len

    def channel_of(self, x: np.ndarray) -> np.ndarray:
        """Output channel of detector columns ``x``."""
        return np.asarray(x) // self.width

    def fast_index(self, x: np.ndarray) -> np.ndarray:
        """Position u of columns ``x`` in their channel's read of a row (0 read first)."""
        x = np.asarray(x)
        c = x // self.width
        u = x - c * self.width
        return np.where(c % 2 == 0, u, self.width - 1 - u)

    def columns(self, c: int, x0: int = 0, x1: int | None = None) -> np.ndarray:
        """Detector columns of channel ``c`` within ``x0 ... x1 - 1``."""
        x1 = self.shape[1] if x1 is None else x1
        lo, hi = max(x0, c * self.width), min(x1, (c + 1) * self.width, self.shape[1])
        return np.arange(lo, hi) if hi > lo else np.zeros(0, np.int64)
