"""Reference pixels and the reference-pixel correction of a multi-output infrared array.

A border of ``n`` pixels on every side of the detector is not light sensitive: its pixels
are read like the others (so they carry the outputs' bias offsets and correlated read noise,
and white read noise) but collect no charge. A reduction uses them in two steps, as is common
practice for such arrays (e.g. Rauscher et al. 2015, PASP 127, 1144 [from memory]):

1. per output, its offset = the mean of its reference rows (the ``n`` top and ``n`` bottom
   rows within its columns), subtracted from all its pixels;
2. per row, the common mode = the mean over the reference columns (``n`` on the left, ``n`` on
   the right, after step 1) of the rows y - k ... y + k (a running mean of 2k + 1 rows, fewer
   at the detector's top and bottom), subtracted from every pixel of the row.

What remains: each output's own pink noise (the reference columns belong to the outer two
outputs), the common pink noise faster than the running mean, and the white and pink noise of
the estimates themselves. Every estimate is computed from whole reference rows and exact
sliding sums, so it is the same for every window of the detector.
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Callable, Hashable

import numpy as np

__all__ = ["reference_mask", "RefCorrection"]

#: Estimates made so far in this process, per exposure (the correlated noise, the key of its
#: white noise and the border width): its outputs' offsets and each detector row's mean of
#: the reference columns, with which rows are known. Every tile of an exposure needs the
#: offsets and the tiles side by side the same rows: they are read once per process.
_MADE: OrderedDict = OrderedDict()
#: Exposures kept (a few hundred bytes per detector row each).
_MADE_KEPT = 64


def reference_mask(shape: tuple, n: int, y0: int = 0, y1: int | None = None, x0: int = 0,
                   x1: int | None = None) -> np.ndarray:
    """True on the reference pixels (border of ``n``) of a detector of ``shape``, on the
    window rows ``y0:y1``, columns ``x0:x1``."""
    ny, nx = shape
    y1 = ny if y1 is None else y1
    x1 = nx if x1 is None else x1
    ys, xs = np.arange(y0, y1), np.arange(x0, x1)
    ry = (ys < n) | (ys >= ny - n)
    rx = (xs < n) | (xs >= nx - n)
    return ry[:, None] | rx[None, :]


class RefCorrection:
    """Offsets and running common mode of one exposure from its reference pixels.

    Parameters
    ----------
    noise : CorrelatedNoise
        The exposure's correlated noise (:meth:`CorrelatedNoise.window`, e- per frame).
    white : callable (y0, y1, x0, x1) -> ndarray (e- per frame)
        The white read noise of the detector's pixels on a window (the same deviates the
        detector draws there).
    n : int
        Reference border width (pixels).
    half_rows : int
        k: the common mode of a row is the running mean of 2k + 1 rows of reference columns.
    key : hashable or None
        Names ``white``'s deviates (the same key: the same numbers), so that corrections of
        one exposure made for different windows share their estimates (offsets, row means)
        within the process; None: this object keeps its own.
    """

    def __init__(self, noise, white: Callable, n: int, half_rows: int,
                 key: Hashable | None = None):
        self.noise, self.white, self.n, self.k = noise, white, int(n), int(half_rows)
        self.layout = noise.layout
        made = None if key is None else _MADE.get((noise, key, self.n))
        if made is None:
            ny = self.layout.shape[0]
            made = ({}, np.zeros(ny), np.zeros(ny, bool))
            if key is not None:
                _MADE[(noise, key, self.n)] = made
                if len(_MADE) > _MADE_KEPT:
                    _MADE.popitem(last=False)
        else:
            _MADE.move_to_end((noise, key, self.n))
        self._off, self._rows, self._known = made

    def _read(self, y0, y1, x0, x1) -> np.ndarray:
        return self.noise.window(y0, y1, x0, x1) + self.white(y0, y1, x0, x1)

    def offset(self, c: int) -> float:
        """Estimated offset of output ``c`` (e- per frame): mean of its reference rows."""
        if c not in self._off:
            ny = self.layout.shape[0]
            cols = self.layout.columns(c)
            lo, hi = int(cols[0]), int(cols[-1]) + 1
            top = self._read(0, self.n, lo, hi)
            bottom = self._read(ny - self.n, ny, lo, hi)
            self._off[c] = float(np.concatenate([top.ravel(), bottom.ravel()]).mean())
        return self._off[c]

    def common_mode(self, y0: int, y1: int) -> np.ndarray:
        """Running common mode (e- per frame) of rows ``y0:y1`` from the reference columns."""
        ny, nx = self.layout.shape
        n, k = self.n, self.k
        ya, yb = max(0, y0 - k), min(ny, y1 + k)
        todo = np.flatnonzero(~self._known[ya:yb]) + ya
        if todo.size:  # each row's mean is its own: rows read for another window are kept
            ra, rb = int(todo[0]), int(todo[-1]) + 1
            left = self._read(ra, rb, 0, n) - self.offset(0)
            right = self._read(ra, rb, nx - n, nx) - \
                self.offset(int(self.layout.channel_of(nx - 1)))
            self._rows[ra:rb] = np.concatenate([left, right], axis=1).mean(axis=1)
            self._known[ra:rb] = True
        per_row = self._rows[ya:yb]
        pad = np.concatenate([np.zeros(k), per_row, np.zeros(k)])
        cnt = np.concatenate([np.zeros(k), np.ones(per_row.size), np.zeros(k)])
        # row y (index y - ya + k in pad) averages pad[y - ya : y - ya + 2k + 1]
        win = np.lib.stride_tricks.sliding_window_view(pad, 2 * k + 1)
        cwin = np.lib.stride_tricks.sliding_window_view(cnt, 2 * k + 1)
        i = np.arange(y0, y1) - ya
        return win[i].sum(axis=1) / cwin[i].sum(axis=1)

    def parts(self, y0: int, y1: int, x0: int, x1: int) -> tuple[np.ndarray, np.ndarray]:
        """(per column, per row) parts of :meth:`window` (e- per frame, float64): each
        column's output offset, each row's common mode."""
        lay = self.layout
        off = np.array([self.offset(int(c)) for c in
                        range(x0 // lay.width, (x1 - 1) // lay.width + 1)])
        return off[lay.channel_of(np.arange(x0, x1)) - x0 // lay.width], \
            self.common_mode(y0, y1)

    def window(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        """The correction (e- per frame) a reduction subtracts on rows ``y0:y1``, columns
        ``x0:x1``: its output's offset plus the row's common mode."""
        per_col, per_row = self.parts(y0, y1, x0, x1)
        return per_col[None, :] + per_row[:, None]
