"""Correlated read noise of one exposure: pink noise common to all outputs, each output's own
pink noise and a bias offset per output, on any window of the detector.

Everything here is in e- per frame read (the units of the frame read noise); the exposure
hook (:mod:`simfield.readout.exposure`) turns it into the fitted slope (e-/s) with the same
factor sqrt(sum_j c_j^2) as the white frame read noise. That treats the correlated part like
the white part, as if each frame carried its own realisation: an approximation (real 1/f noise
is also correlated between the frames of a ramp, which changes how much of its slowest part
the slope fit keeps), stated in the README.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..random import stream
from .layout import ReadoutLayout
from .pink import grid_at, pink_coefficient, pink_grid

__all__ = ["CorrelatedNoise"]


@dataclass(frozen=True)
class CorrelatedNoise:
    """The correlated read noise of one exposure of a detector.

    Attributes
    ----------
    layout : ReadoutLayout
    seed : int
    names : tuple
        The exposure's stream names, e.g. ``("readout", band, k)``; every output's streams hang
        below them, so the noise depends on the seed and the exposure only.
    pink_common_e, pink_channel_e : float (e- per frame)
        rms of the pink part common to all outputs and of each output's own, over the read.
    offset_e : float (e- per frame)
        rms of the per-output bias offsets.
    """

    layout: ReadoutLayout
    seed: int
    names: tuple
    pink_common_e: float
    pink_channel_e: float
    offset_e: float

    def offset(self, c: int) -> float:
        """Bias offset of output ``c`` (e- per frame)."""
        if self.offset_e <= 0:
            return 0.0
        return float(self.offset_e * stream(self.seed, *self.names, "offset", c).standard_normal())

    def channel_grids(self, y0: int, y1: int, x0: int, x1: int) -> tuple[int, int, np.ndarray]:
        """(i0, c0, grids): the summed pink grid (common + own + the offset, e- per frame,
        float32) of each output c0, c0 + 1, ... reading columns ``x0:x1``, over rows
        ``y0:y1``; grid point i0 + j is sample (i0 + j) ``STEP`` (:func:`pink_grid`).
        :meth:`window` interpolates them at the pixels' read times."""
        lay = self.layout
        a_c = pink_coefficient(lay, self.pink_common_e)
        a_o = pink_coefficient(lay, self.pink_channel_e)
        i0, gc = pink_grid(lay, a_c, self.seed, (*self.names, "common"), y0, y1)
        c0, c1 = x0 // lay.width, (x1 - 1) // lay.width
        grids = np.empty((c1 - c0 + 1, gc.size), np.float32)
        for c in range(c0, c1 + 1):
            grids[c - c0] = gc + pink_grid(lay, a_o, self.seed, (*self.names, c), y0, y1)[1] \
                + self.offset(c)
        return i0, c0, grids

    def window(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        """Correlated noise (e- per frame, float32) of detector rows ``y0:y1``, columns ``x0:x1``.

        The same pixel gets the same value whichever window asks (the streams belong to the
        outputs and their chunks of rows, not to the window).
        """
        lay = self.layout
        out = np.zeros((y1 - y0, x1 - x0), np.float32)
        i0, c0, grids = self.channel_grids(y0, y1, x0, x1)
        for c in range(c0, c0 + len(grids)):
            cols = lay.columns(c, x0, x1)
            if cols.size:
                out[:, cols - x0] = grid_at(lay, i0, grids[c - c0], y0, y1,
                                            lay.fast_index(cols))
        return out
