"""Clustered positions of field galaxies: a log-normal density field sampled per galaxy.

Target
------
Magnitude-limited deep fields give an angular correlation function of power-law form,
w(theta) = A theta^(1 - gamma), gamma ~ 1.8, with the amplitude at 1 arcsec falling with
apparent magnitude as w(1") ~ 10^(-0.27 m) to m ~ 26 and more slowly beyond (Villumsen,
Freudling & da Costa 1997, ApJ 481, 578, deep-field galaxies to R ~ 29; amplitudes and slopes
[from memory]):

    log10 A(m) = -1.0 - 0.27 (m - 24)         m <= 26
               = -1.54 - 0.10 (m - 26)        m > 26        (A: w at 1 arcsec)

with m the galaxy's selection-band magnitude (the optical relation applied in the selection
band, colours ignored: an approximation), held at its m = 22 value for brighter galaxies.

Method
------
Galaxies at different redshifts do not trace the same structures: the light cone is cut into
redshift slices (:data:`Z_EDGES`), each with an independent Gaussian field G on a grid
(:data:`CELL_ARCSEC` cells over the field padded by :data:`PAD_ARCSEC`, periodic, so pairs
up to 60" apart keep their correlation), whose covariance
is C(theta) = ln(1 + A_G theta^(1 - gamma)) (A_G = :data:`FIELD_AMPLITUDE`; the zero lag takes
the value at 0.4 cell):
its power spectrum is the FFT of C on the periodic grid (the discrete Hankel transform), clipped
at 0. A galaxy of amplitude A_i is placed in a cell with probability proportional to
exp(b G - b^2 sigma^2 / 2), b^2 = A_i / A_G, whose correlation is (1 + A_G theta^(1-gamma))^(b^2)
- 1 ~ A_i theta^(1 - gamma) (exact for b = 1; for b^2 in [0.3, 3] within 10 % at 1" and
less at larger angles),
then uniformly inside the cell. The galaxies of a magnitude bin in slice k (a fraction f_k of
the bin) get A_i = A(m) / sum_k f_k^2, so that the whole bin, a sum of independent slices, has
w = A(m) theta^(1 - gamma). Amplitudes are quantised to 0.05 dex (one cumulative sum per slice
and level). Only positions change: the number of galaxies and their magnitudes are the
uniform placement's.

Units: arcsec (positions, angles), amplitudes at 1 arcsec.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import scipy.fft as sfft
from astropy.table import Table

__all__ = ["GAMMA", "Z_EDGES", "CELL_ARCSEC", "PAD_ARCSEC", "amplitude_1arcsec",
           "FIELD_AMPLITUDE", "gaussian_field", "sample_positions", "place_clustered"]

GAMMA = 1.8
#: redshift slices with independent density fields
Z_EDGES = (0.0, 1.0, 2.0, 3.0, 4.5, 6.0, 8.0, 1e3)
CELL_ARCSEC = 0.25  #: grid cell (arcsec); coarser if the field needs more than MAX_CELLS
PAD_ARCSEC = 30.0  #: padding on every side (arcsec): the periodic grid exceeds the field by 60"
MAX_CELLS = 2048
FIELD_AMPLITUDE = 0.1  #: w(1") of the Gaussian field's own log-normal population (b = 1)
_LEVEL_DEX = 0.05
_FIELD_KINDS = ("galaxy", "dusty", "quiescent")


def amplitude_1arcsec(mag):
    """w(1 arcsec) of galaxies of apparent magnitude ``mag`` (AB; module docstring)."""
    m = np.maximum(np.asarray(mag, dtype=float), 22.0)
    return 10.0 ** np.where(m <= 26.0, -1.0 - 0.27 * (m - 24.0), -1.54 - 0.10 * (m - 26.0))


def _grid(x_range, y_range):
    (x0, x1), (y0, y1) = x_range, y_range
    span = max(x1 - x0, y1 - y0) + 2 * PAD_ARCSEC
    cell = max(CELL_ARCSEC, span / MAX_CELLS)
    nx = int(np.ceil((x1 - x0 + 2 * PAD_ARCSEC) / cell))
    ny = int(np.ceil((y1 - y0 + 2 * PAD_ARCSEC) / cell))
    return cell, ny, nx


@lru_cache(maxsize=4)
def _spectrum(shape, cell, amplitude, gamma):
    """(sqrt of the power spectrum as an rfft2 half-plane, field variance) of the covariance
    ln(1 + amplitude theta^(1 - gamma)) on the periodic grid (module docstring)."""
    ny, nx = shape
    dy = np.minimum(np.arange(ny), ny - np.arange(ny)) * cell
    dx = np.minimum(np.arange(nx), nx - np.arange(nx)) * cell
    theta = np.hypot(dy[:, None], dx[None, :])
    theta[0, 0] = 0.4 * cell
    cov = np.log1p(amplitude * theta ** (1.0 - gamma))
    power = np.clip(sfft.rfft2(cov).real, 0.0, None)
    # the variance is the zero lag of the clipped spectrum's covariance
    return np.sqrt(power), float(sfft.irfft2(power, s=shape)[0, 0])


def gaussian_field(shape, cell, rng, amplitude=FIELD_AMPLITUDE, gamma=GAMMA):
    """Gaussian random field on a periodic grid of ``shape`` with cells of ``cell`` arcsec,
    covariance ln(1 + amplitude theta^(1 - gamma)) (theta in arcsec); returns (field,
    variance)."""
    amp, var = _spectrum(tuple(shape), float(cell), float(amplitude), float(gamma))
    g = sfft.irfft2(amp * sfft.rfft2(rng.standard_normal(shape)), s=shape)
    return g, var


def sample_positions(field, variance, cell, origin, inside, b2, rng):
    """Positions (x, y) (arcsec) of galaxies with squared bias ``b2`` (one value per galaxy)
    drawn from exp(b G - b^2 variance / 2) over the cells ``inside`` (bool mask), each then
    uniform in its cell; ``origin`` (x, y) of cell [0, 0]'s corner."""
    b2 = np.asarray(b2, dtype=float)
    n = b2.size
    x = np.empty(n)
    y = np.empty(n)
    cells = np.flatnonzero(inside)
    g = field.ravel()[cells]
    levels = np.round(np.log10(b2) / _LEVEL_DEX).astype(int)
    for lev in np.unique(levels):
        idx = np.flatnonzero(levels == lev)
        b = np.sqrt(10.0 ** (lev * _LEVEL_DEX))
        w = np.exp(b * g - b * b * variance / 2 - (b * g).max())
        cum = np.cumsum(w)
        pick = cells[np.minimum(np.searchsorted(cum, cum[-1] * rng.random(idx.size)),
                                cells.size - 1)]
        iy, ix = np.divmod(pick, field.shape[1])
        x[idx] = origin[0] + (ix + rng.random(idx.size)) * cell
        y[idx] = origin[1] + (iy + rng.random(idx.size)) * cell
    return x, y


def place_clustered(t: Table, band: str, x_range, y_range, rng: np.random.Generator) -> None:
    """Move the field galaxies of ``t`` (kinds galaxy, dusty, quiescent) to clustered
    positions inside ``x_range`` x ``y_range`` (arcsec), in place (module docstring);
    ``band`` names the magnitude column ``mag_<band>`` the amplitudes use."""
    kind = np.asarray(t["kind"]).astype(str)
    gal = np.flatnonzero(np.isin(kind, _FIELD_KINDS))
    if gal.size == 0:
        return
    z = np.asarray(t["redshift"], float)[gal]
    mag = np.asarray(t[f"mag_{band}"], float)[gal]
    cell, ny, nx = _grid(x_range, y_range)
    origin = (x_range[0] - PAD_ARCSEC, y_range[0] - PAD_ARCSEC)
    xc = origin[0] + (np.arange(nx) + 0.5) * cell
    yc = origin[1] + (np.arange(ny) + 0.5) * cell
    inside = ((yc[:, None] >= y_range[0]) & (yc[:, None] < y_range[1])
              & (xc[None, :] >= x_range[0]) & (xc[None, :] < x_range[1]))
    sl = np.clip(np.searchsorted(Z_EDGES, z, side="right") - 1, 0, len(Z_EDGES) - 2)
    # share of each slice in each 1-mag bin: A_i = A(m) / sum_k f_k^2
    mbin = np.floor(np.nan_to_num(mag, nan=99.0)).astype(int)
    b2 = np.empty(gal.size)
    for mb in np.unique(mbin):
        sel = mbin == mb
        f = np.bincount(sl[sel], minlength=len(Z_EDGES) - 1) / sel.sum()
        b2[sel] = amplitude_1arcsec(mag[sel]) / np.sum(f ** 2) / FIELD_AMPLITUDE
    x = np.empty(gal.size)
    y = np.empty(gal.size)
    for k in range(len(Z_EDGES) - 1):
        idx = np.flatnonzero(sl == k)
        if idx.size == 0:
            continue
        field, var = gaussian_field((ny, nx), cell, rng, FIELD_AMPLITUDE)
        x[idx], y[idx] = sample_positions(field, var, cell, origin, inside, b2[idx], rng)
    t["x_arcsec"][gal] = x
    t["y_arcsec"][gal] = y
