"""1/f ("pink") read noise as a time stream, synthesised in Fourier space, cut at any window.

Model (one output's time stream, one-sided power spectral density in e-^2 / Hz)::

    S(f) = 2 dt sigma_w^2 + A / f,     A = sigma_p^2 / ln(f_N / f_1),

white noise of variance sigma_w^2 per sample plus a pink part whose variance between the
lowest frequency of the read, f_1 = 1 / (n_samples dt), and the Nyquist frequency
f_N = 1 / (2 dt) is sigma_p^2 (the integral of A / f over that band). This is the shape of
the noise model of Rauscher et al. (2015, PASP 127, 1144) for infrared arrays read through
several outputs [from memory: white read noise plus 1/f noise with a part common to all
outputs ("correlated pink") and a part of each output's own ("uncorrelated pink"); the
amplitudes used here are the project's own, see conf/detector/hgcdte.yaml]. The white part
is drawn per pixel by :mod:`simfield.detector`; this module makes the pink part.

Synthesis that any window can cut (the same value at a sample, whichever tile asks), on a
time grid of ``STEP`` samples that is linearly interpolated to every sample:

- low frequencies, S(f) g(f) with g = 1 / (1 + (f / f_c)^4), f_c = 1 / (``LOW_STEP`` x 16 dt):
  white noise of the whole read on a grid ``LOW_STEP`` samples apart, shaped by sqrt(S g) in
  Fourier space (one real FFT pair of n_samples / ``LOW_STEP`` points, cheap, made once);
- higher frequencies, S(f) (1 - g(f)) up to the grid's Nyquist frequency f_N / ``STEP``:
  chunks of ``CHUNK`` grid points plus ``CHUNK`` / 8 on each side, each from its own random
  stream, shaped in Fourier space (the gain divided by the sinc^2 amplitude response of the linear
  interpolation, so the interpolated spectrum follows the model) and overlap-added with
  sine/cosine tapers whose squares sum to one, so the variance is stationary. A window needs
  only the chunks of its samples.

Above f_N / ``STEP`` (6.25 kHz at 10 us per pixel) the pink part is left out: there A / f is a
few per cent of the white read noise's level at the default amplitudes, and its share of the
pink variance, A ln(``STEP``), is stated by :func:`pink_variance`. The two parts are
independent and their spectra add to S(f) below that frequency (checked in the tests with
:func:`scipy.signal.welch` against the model).
"""

from __future__ import annotations

import math
from collections import OrderedDict
from functools import lru_cache

import numpy as np
from scipy import fft as sfft

from ..random import stream
from .layout import ReadoutLayout

__all__ = ["STEP", "LOW_STEP", "CHUNK", "pink_coefficient", "pink_psd", "pink_variance",
           "pink_grid", "grid_at", "pink_rows"]

#: Samples between points of the synthesis grid (linear interpolation in between).
STEP = 8
#: Samples between points of the low-frequency grid.
LOW_STEP = 64
#: Grid points per high-frequency chunk (plus CHUNK // 8 of taper on each side).
CHUNK = 2048


def pink_coefficient(layout: ReadoutLayout, sigma: float) -> float:
    """A (e-^2) such that A / f has variance ``sigma``^2 (e-) over f_1 ... f_N (whole read)."""
    return sigma * sigma / math.log(layout.n_samples / 2.0)


def pink_variance(layout: ReadoutLayout, a: float) -> float:
    """Variance (e-^2) of the synthesised pink part: A ln(f_N / (f_1 STEP)) (the part above
    the grid's Nyquist frequency, A ln(STEP), is left out)."""
    return a * math.log(layout.n_samples / 2.0 / STEP)


def pink_psd(f: np.ndarray, a: float) -> np.ndarray:
    """One-sided PSD A / f (e-^2 / Hz) at frequencies ``f`` (Hz); 0 at f = 0."""
    f = np.asarray(f, float)
    return np.where(f > 0, a / np.where(f > 0, f, 1.0), 0.0)


def _crossover(f: np.ndarray, fc: float) -> np.ndarray:
    return 1.0 / (1.0 + (np.asarray(f) / fc) ** 4)


def _fc(layout: ReadoutLayout) -> float:
    return 1.0 / (16 * LOW_STEP * layout.dt_s)


@lru_cache(maxsize=256)
def _low_stream(layout: ReadoutLayout, a: float, seed: int, names: tuple) -> np.ndarray:
    """The low-frequency part on its grid (``LOW_STEP`` samples apart), e-."""
    n = 2 * math.ceil((layout.n_samples / LOW_STEP + 2) / 2)
    dtc = LOW_STEP * layout.dt_s
    f = np.fft.rfftfreq(n, dtc)
    shape = np.sqrt(pink_psd(f, a) * _crossover(f, _fc(layout)) / (2.0 * dtc))
    # the spectrum of n real unit normals drawn directly: Re, Im of variance n / 2, the
    # Nyquist term real of variance n (the mean term is 0 in the model)
    z = stream(seed, *names, "low").standard_normal((2, f.size))
    spec = (z[0] + 1j * z[1]) * np.sqrt(n / 2.0)
    spec[-1] = z[0, -1] * np.sqrt(n)
    vals = sfft.irfft(spec * shape, n)
    vals.setflags(write=False)
    return vals


@lru_cache(maxsize=64)
def _chunk_shape(layout: ReadoutLayout, a: float) -> tuple:
    """Spectral gain and the two tapers of a high-frequency chunk (cached per layout)."""
    m = CHUNK // 8
    n = CHUNK + 2 * m
    dtc = STEP * layout.dt_s
    f = np.fft.rfftfreq(n, dtc)
    gain = np.sqrt(pink_psd(f, a) * (1.0 - _crossover(f, _fc(layout))) / (2.0 * dtc))
    # linear interpolation between grid points (a triangle kernel) passes amplitude at f with
    # sinc^2(f STEP dt): divided out (capped) so the interpolated spectrum follows the model
    gain /= np.maximum(np.sinc(f * dtc) ** 2, 0.25)
    # spectrum of n real unit normals: Re, Im each of variance n / 2 (the Nyquist term real,
    # variance n; the mean term is 0 here), so the gain carries sqrt(n / 2)
    gain = gain * math.sqrt(n / 2.0)
    gain[-1] *= math.sqrt(2.0)
    s = (np.arange(2 * m) + 0.5) / (2 * m) * (math.pi / 2)
    return n, gain, np.sin(s), np.cos(s)


#: High-frequency chunks made so far in this process, (layout, a, seed, names, j) -> values,
#: least recently used first: the reference-pixel correction asks again for the rows a window
#: has just drawn.
_CHUNKS: OrderedDict = OrderedDict()
_CHUNKS_KEPT = 4096


def _chunks(layout: ReadoutLayout, a: float, seed: int, names: tuple, j0: int,
            j1: int) -> list:
    """High-frequency chunks j0 ... j1 - 1 on the grid, tapered (e-): chunk j holds grid points
    j CHUNK - m ... (j + 1) CHUNK + m - 1 (m = CHUNK // 8) and comes from its own stream. The
    ones not made yet are transformed together (one batched inverse FFT, the same numbers as
    one transform each: pocketfft transforms every row alike)."""
    keys = [(layout, a, seed, names, j) for j in range(j0, j1)]
    got = {}
    for k in keys:
        if k in _CHUNKS:
            got[k] = _CHUNKS[k]
            _CHUNKS.move_to_end(k)
    todo = [k for k in keys if k not in got]
    if todo:
        n, gain, up, down = _chunk_shape(layout, a)
        z = np.stack([stream(seed, *names, "high", k[-1] + 1).standard_normal((2, gain.size))
                      for k in todo])  # j >= -1
        spec = (z[:, 0] + 1j * z[:, 1]) * gain
        spec[:, 0] = 0.0
        spec[:, -1] = z[:, 0, -1] * gain[-1]
        x = sfft.irfft(spec, n, axis=-1)
        m = up.size
        x[:, :m] *= up
        x[:, -m:] *= down
        x.setflags(write=False)
        got.update(zip(todo, x))
        _CHUNKS.update(zip(todo, x))
        while len(_CHUNKS) > _CHUNKS_KEPT:  # the least recently used go first
            _CHUNKS.popitem(last=False)
    return [got[k] for k in keys]


def _grid_values(layout: ReadoutLayout, a: float, seed: int, names: tuple, i0: int,
                 i1: int) -> np.ndarray:
    """The pink stream (e-) at grid points i0 ... i1 - 1 (samples i STEP)."""
    low = _low_stream(layout, a, seed, names)
    out = np.interp(np.arange(i0, i1) * (STEP / LOW_STEP), np.arange(low.size), low)
    m = CHUNK // 8
    j0, j1 = (i0 - m) // CHUNK, (i1 - 1 + m) // CHUNK + 1
    for j, x in zip(range(j0, j1), _chunks(layout, a, seed, names, j0, j1)):
        s0 = j * CHUNK - m
        lo, hi = max(s0, i0), min(s0 + x.size, i1)
        if hi > lo:
            out[lo - i0:hi - i0] += x[lo - s0:hi - s0]
    return out


def pink_grid(layout: ReadoutLayout, a: float, seed: int, names: tuple, y0: int,
              y1: int) -> tuple[int, np.ndarray]:
    """The pink stream (e-) of one output on the synthesis grid over rows ``y0 ... y1 - 1``:
    (index i0 of the first grid point, values); grid point i is sample i ``STEP``. Grids of
    several streams over the same rows can be added before :func:`grid_at` (one
    interpolation for their sum)."""
    r = layout.row_len
    i0, i1 = y0 * r // STEP, (y1 * r - 1) // STEP + 2
    if a <= 0:
        return i0, np.zeros(i1 - i0)
    return i0, _grid_values(layout, float(a), int(seed), tuple(names), i0, i1)


def grid_at(layout: ReadoutLayout, i0: int, g: np.ndarray, y0: int, y1: int,
            u: np.ndarray) -> np.ndarray:
    """Linear interpolation (float32, e-) of grid values ``g`` (from :func:`pink_grid`) at
    rows ``y0 ... y1 - 1`` and read positions ``u``: shape (y1 - y0, len(u))."""
    r = layout.row_len
    g = np.asarray(g, np.float32)
    u = np.asarray(u, np.int64)
    if u.size > 8 and np.all(np.diff(u) == u[1] - u[0]) and abs(u[1] - u[0]) == 1:
        # a run of read positions: interpolate whole rows by broadcasting, then cut the run
        w = np.arange(STEP, dtype=np.float32) * np.float32(1.0 / STEP)
        full = (g[:-1, None] * (1 - w) + g[1:, None] * w).ravel()  # samples from i0 STEP on
        rows = full[y0 * r - i0 * STEP:y1 * r - i0 * STEP].reshape(y1 - y0, r)
        lo, hi = int(u.min()), int(u.max()) + 1
        return rows[:, lo:hi] if u[1] > u[0] else rows[:, lo:hi][:, ::-1]
    t = (np.arange(y0, y1, dtype=np.int64) * r - i0 * STEP)[:, None] + u
    k = t // STEP
    w = (t - k * STEP).astype(np.float32) * np.float32(1.0 / STEP)
    lo = g[k]
    return lo + (g[k + 1] - lo) * w


def pink_rows(layout: ReadoutLayout, a: float, seed: int, names: tuple, y0: int,
              y1: int, u: np.ndarray | None = None) -> np.ndarray:
    """Pink noise (e-, float32) of one output at rows ``y0 ... y1 - 1`` and read positions
    ``u`` (:meth:`ReadoutLayout.fast_index`; None: all ``row_len``), shape (y1 - y0, len(u)).

    Parameters
    ----------
    layout : ReadoutLayout
    a : float (e-^2)
        Pink coefficient (:func:`pink_coefficient`).
    seed : int
    names : tuple
        The stream's names (exposure and output), e.g. ``("readout", band, k, 2)``.
    y0, y1 : int (detector rows)
    u : int array or None
    """
    u = np.arange(layout.row_len) if u is None else np.asarray(u, np.int64)
    i0, g = pink_grid(layout, a, seed, names, y0, y1)
    return grid_at(layout, i0, g, y0, y1, u)
