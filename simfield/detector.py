"""Infrared array exposures: up-the-ramp readout, noise and artefacts, in e-/s.

One exposure is a ramp of ``n_groups`` groups of ``n_frames`` frames read without gaps after a
reset. Frame j (0-based) is read at t_j = (j + 1) t_f; group k averages frames k m ... k m + m - 1;
the pipeline fits a least-squares line with equal weights to the group averages (the estimator
of Rauscher et al. 2007, PASP 119, 768). The exposure time ``exptime_s`` is the slope baseline,
(n - 1) t_g with t_g = m t_f, so t_f = exptime_s / ((n - 1) m); the ramp itself lasts n t_g.

How the noise is drawn (instead of simulating every frame)
-----------------------------------------------------------
The fitted slope is a linear combination b = sum_j c_j S_j of the frame values S_j. Read noise
enters as sigma_f^2 sum_j c_j^2, exactly Gaussian. The charge is a Poisson process: an electron
arriving in frame interval i (between reads i - 1 and i) adds D_i = sum_{j >= i} c_j to b. Given
the total charge N of the ramp (Poisson, drawn exactly), arrival times are independent and
uniform, so the charge part of b is a compound Poisson sum with mean lam E[D] and variance
lam E[D^2] (lam = f x ramp duration, the D_i averaged over the frame intervals). It is drawn as
one scaled Poisson deviate, b = c N', N' ~ Poisson(lam'), with c = E[D^2] / E[D] and
lam' = lam E[D]^2 / E[D^2]: the same mean and variance exactly (c lam' = lam E[D],
c^2 lam' = lam E[D^2] = b_full f), one deviate per pixel. With :class:`PixelNoise` (windows of a
large detector, as a tiled mosaic uses) N' is exact below 20 and above by a Cornish-Fisher
expansion with the Poisson mean and skewness. The resulting variance is Rauscher et al. 2007
eq. 1, which the tests check against a Monte Carlo of frames. Read noise is the one normal
deviate per pixel; a pixel whose slope is refitted (cosmic-ray jump, saturation) replaces its
whole slope and reuses that pixel's read-noise deviate, which nothing else uses. Integer-ADU readout adds
gain^2 / 12 to the frame variance (uniform quantisation error, valid while the frame read noise
exceeds about one ADU; checked in the tests against quantised frames).

Effects (each switched by a :class:`~simfield.config.DetectorConfig` boolean)
-----------------------------------------------------------------------------
- ``flat``: pixel response P ~ 1 + flat_rms N(0, 1) multiplies the photo-current. The pipeline
  divides by a calibration flat P (1 + flat_error_rms N(0, 1)), so only the calibration error
  stays in the image (and the noise is scaled by 1 / P). That error, -epsilon x signal with
  epsilon ~ N(0, flat_error_rms), is fixed per pixel; ``var`` carries its variance
  (flat_error_rms x signal)^2.
- ``dark_current``: dark_e_s accumulates (with shot noise). The pipeline subtracts a
  calibration dark, as a reduction does: the mean of ``dark_cal_ramps`` dark ramps of the same
  readout, so it holds each pixel's own dark (hot pixels included) after IPC, plus the noise of
  that mean (variance = one dark ramp's slope variance / ``dark_cal_ramps``), a fixed pattern
  that stays in every exposure and is part of ``var``.
- ``bad_pixels``: hot (dark current ``hot_dark_e_s`` x 1...100, flagged ``DQ_HOT``) and dead
  (P = 0, flagged ``DQ_DEAD``) pixels, fixed per detector (:func:`make_fixed_pattern`) and
  known to the reduction (from its darks and flats). With IPC on, their four neighbours share
  their charge (a hot pixel's dark, a dead pixel's missing signal) and are flagged
  ``DQ_BAD_NEIGHBOUR``; all three are left out of the mosaic.
- ``poisson``: shot noise of sky + sources + dark.
- ``ipc``: inter-pixel capacitance, a 3x3 kernel with ``ipc_alpha`` on the four neighbours and
  1 - 4 alpha in the centre, acting on the collected charge (read noise is added after it).
- ``cosmic_rays``: events at ``cosmic_ray_rate_cm2_s`` per cm^2 of detector (pixel area from
  ``pixel_size_um``) during the ramp, each a short straight track touching a few pixels with a
  log-normal total charge around ``cosmic_ray_charge_e`` (Rauscher & Fixsen 2025, PASP 137,
  095003: a few ions per cm^2 per s, ~7 pixels, several thousand e-). A deposit whose jump
  exceeds ``jump_threshold_sigma`` times the noise of a group difference is detected: the pixel
  is flagged ``DQ_COSMIC_RAY`` and its slope is fitted to the longest clean run of groups (its
  variance grows accordingly); with fewer than two clean groups it gets ``DQ_NO_SLOPE``.
  Fainter deposits stay in the ramp and bias the slope by charge x D_i: the exposure's
  ``artefact`` image holds that bias (e-/s), which no noise model describes.
- ``saturation``: groups whose last frame holds more than ``full_well_e`` are dropped; a pixel
  that loses groups is flagged ``DQ_SATURATED`` and fitted to the rest; with fewer than two
  groups left it gets ``DQ_NO_SLOPE`` and sci = 0.
- ``read_noise`` and ``quantize`` (gain_e_adu): see above.

Pixels with a redrawn slope (``DQ_COSMIC_RAY``, ``DQ_SATURATED``) get Gaussian noise of their
segment's variance around the IPC-convolved expected rate. The ``var`` estimate is the noise
model at the expected (noiseless) rate, like a variance from a smoothed rate image.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .config import DetectorConfig, frame_read_noise_e
from . import pixelops
from .errors import check_range, require

__all__ = [
    "DQ_HOT",
    "DQ_DEAD",
    "DQ_COSMIC_RAY",
    "DQ_SATURATED",
    "DQ_NO_SLOPE",
    "DQ_BAD_NEIGHBOUR",
    "DQ_EXCLUDE",
    "sky_noise_terms",
    "FixedPattern",
    "Exposure",
    "make_fixed_pattern",
    "fixed_pattern_window",
    "frame_time",
    "slope_weights",
    "slope_variance_factors",
    "apply_ipc",
    "PixelNoise",
    "expose",
]

#: DQ bit: hot pixel (dark current ``hot_dark_e_s`` x 1...100); excluded from mosaics.
DQ_HOT = 1
#: DQ bit: dead pixel (no response); excluded.
DQ_DEAD = 2
#: DQ bit: cosmic-ray jump detected; slope from the longest clean run of groups (kept).
DQ_COSMIC_RAY = 4
#: DQ bit: saturated before the end of the ramp; slope from the unsaturated groups (kept).
DQ_SATURATED = 8
#: DQ bit: fewer than two usable groups, no slope, sci = 0 (excluded).
DQ_NO_SLOPE = 32
#: DQ bit: one of the four IPC neighbours of a hot or dead pixel (excluded).
DQ_BAD_NEIGHBOUR = 64
#: Pixels with these bits should not be used (simfield.survey gives them zero weight).
DQ_EXCLUDE = DQ_HOT | DQ_DEAD | DQ_NO_SLOPE | DQ_BAD_NEIGHBOUR

_CR_SIGMA_LN = 0.5  # log-normal width of the event charge (common practice)
_CR_MAX_LENGTH_PIX = 3.0  # projected track length uniform in [0, this] pixels (common practice)
_CR_POINTS = 6  # charge points along a track, each spread bilinearly (charge diffusion)


@dataclass(frozen=True, eq=False)
class FixedPattern:
    """Per-detector fixed pattern (the same for every exposure of a detector).

    Attributes
    ----------
    flat : ndarray (dimensionless)
        True pixel response (mean 1; dead pixels are zeroed by :func:`expose`, not here).
    flat_cal : ndarray (dimensionless)
        The calibration flat the pipeline divides by.
    hot : ndarray of bool
    hot_dark : ndarray (e-/s)
        Extra dark current of hot pixels (0 elsewhere).
    dead : ndarray of bool
    dark_z : ndarray (dimensionless)
        Standard normal deviates of the calibration dark's noise (scaled in :func:`expose`).
    memo : dict
        What :func:`expose` derives from the pattern alone, kept for the next exposure of the
        same window (another band): read it, do not change it.
    """

    flat: np.ndarray
    flat_cal: np.ndarray
    hot: np.ndarray
    hot_dark: np.ndarray
    dead: np.ndarray
    dark_z: np.ndarray
    memo: dict = field(default_factory=dict, repr=False, compare=False)


@dataclass(frozen=True, eq=False)
class Exposure:
    """One calibrated exposure on its detector grid.

    Attributes
    ----------
    sci : ndarray (e-/s per pixel)
        Fitted slope, dark subtracted, flat fielded; sky still in.
    var : ndarray ((e-/s)^2)
        Variance estimate of ``sci`` (noise model at the expected rate).
    var_sky : ndarray ((e-/s)^2)
        Variance of a source-free pixel (sky + dark + read), for inverse-variance weights.
    dq : ndarray (int32 bit mask)
        ``DQ_*`` bits.
    artefact : ndarray (e-/s per pixel) or None
        The part of ``sci`` that ``var`` does not describe: the slope bias of cosmic-ray
        deposits too faint to be found (None without cosmic rays).
    exptime : float (s)
        Effective exposure time, (n_groups - 1) x group time.
    sky : float (e-/s per pixel)
        Mean sky level in ``sci`` (for sky subtraction).
    n_cr : int
        Cosmic-ray events during the ramp.
    stripes : ndarray (e-/s per pixel) or None
        The part of ``sci`` left by correlated read noise after the reference-pixel
        correction (set by :mod:`simfield.readout`; None without it): truth for the scoring.
    persistence : ndarray (e-/s per pixel) or None
        Persistence current from earlier exposures in ``sci`` (:mod:`simfield.readout`).
    """

    sci: np.ndarray
    var: np.ndarray
    var_sky: np.ndarray
    dq: np.ndarray
    exptime: float
    sky: float
    n_cr: int
    artefact: np.ndarray | None = None
    stripes: np.ndarray | None = None
    persistence: np.ndarray | None = None


def make_fixed_pattern(shape: tuple[int, int], det: DetectorConfig,
                       rng: np.random.Generator) -> FixedPattern:
    """Flat field, hot and dead pixels of one detector.

    Parameters
    ----------
    shape : (ny, nx)
    det : DetectorConfig
    rng : numpy.random.Generator
        Seed it per detector (e.g. ``simfield.random.stream(seed, "detector")``) so every
        exposure of that detector shares the pattern.
    """
    require(len(shape) == 2 and min(shape) > 0, "shape", shape, "must be (ny, nx) with ny, nx > 0")
    flat = np.clip(1.0 + det.flat_rms * rng.standard_normal(shape, dtype=np.float32), 0.05, None)
    flat_cal = flat * (1.0 + det.flat_error_rms * rng.standard_normal(shape, dtype=np.float32))
    u = rng.random(shape)
    hot = u < det.hot_pixel_fraction
    dead = (u >= det.hot_pixel_fraction) & (u < det.hot_pixel_fraction + det.dead_pixel_fraction)
    hot_dark = np.where(hot, det.hot_dark_e_s * 10.0 ** (2.0 * rng.random(shape, np.float32)),
                        0.0).astype(np.float32)
    dark_z = rng.standard_normal(shape, dtype=np.float32)
    return FixedPattern(flat=flat, flat_cal=flat_cal, hot=hot, hot_dark=hot_dark, dead=dead,
                        dark_z=dark_z)


#: Side (pixels) of the detector blocks from which :func:`fixed_pattern_window` is built.
FIXED_BLOCK = 256


def fixed_pattern_window(det: DetectorConfig, seed: int, y0: int, y1: int, x0: int,
                         x1: int, blocks: dict | None = None) -> FixedPattern:
    """Rows ``y0:y1`` and columns ``x0:x1`` of a detector's fixed pattern.

    The detector is cut into ``FIXED_BLOCK`` x ``FIXED_BLOCK`` pixel blocks, each made by
    :func:`make_fixed_pattern` from its own stream ``(seed, "detector_fixed", row, column)``,
    so a pixel's flat, hot and dead values do not depend on which window asks for them and a
    large detector never has to be held whole.

    Parameters
    ----------
    det : DetectorConfig
    seed : int
        Scenario seed.
    y0, y1, x0, x1 : int (detector pixels, 0-based, end exclusive)
        Window; must satisfy 0 <= y0 < y1 and 0 <= x0 < x1.
    blocks : dict, optional
        Blocks made so far, (block row, block column) -> pattern, shared by the calls for
        windows of one detector (the dithered windows of a tile cover nearly the same
        blocks); filled here. The caller drops it when done.
    """
    from .random import stream

    require(0 <= y0 < y1 and 0 <= x0 < x1, "window", (y0, y1, x0, x1),
            "must satisfy 0 <= y0 < y1 and 0 <= x0 < x1")
    b = FIXED_BLOCK
    shape = (y1 - y0, x1 - x0)
    parts = {name: np.empty(shape, dtype) for name, dtype in
             (("flat", np.float32), ("flat_cal", np.float32), ("hot", bool),
              ("hot_dark", np.float32), ("dead", bool), ("dark_z", np.float32))}
    for by in range(y0 // b, (y1 - 1) // b + 1):
        for bx in range(x0 // b, (x1 - 1) // b + 1):
            blk = None if blocks is None else blocks.get((by, bx))
            if blk is None:
                blk = make_fixed_pattern((b, b), det, stream(seed, "detector_fixed", by, bx))
                if blocks is not None:
                    blocks[(by, bx)] = blk
            ys = slice(max(y0, by * b), min(y1, (by + 1) * b))
            xs = slice(max(x0, bx * b), min(x1, (bx + 1) * b))
            src = (slice(ys.start - by * b, ys.stop - by * b),
                   slice(xs.start - bx * b, xs.stop - bx * b))
            dst = (slice(ys.start - y0, ys.stop - y0), slice(xs.start - x0, xs.stop - x0))
            for name, arr in parts.items():
                arr[dst] = getattr(blk, name)[src]
    return FixedPattern(**parts)


def frame_time(det: DetectorConfig, exptime_s: float) -> float:
    """Frame time t_f = exptime_s / ((n_groups - 1) n_frames) (s)."""
    return exptime_s / ((det.n_groups - 1) * det.n_frames)


def slope_weights(n_groups: int, n_frames: int, t_frame_s: float, first: int = 0,
                  count: int | None = None) -> np.ndarray:
    """Coefficients c_j (1/s) of the least-squares slope b = sum_j c_j S_j over all frames.

    The fit uses groups ``first ... first + count - 1`` (equal weights on group averages).

    Returns
    -------
    ndarray, shape (n_groups * n_frames,) (1/s)
    """
    count = n_groups - first if count is None else count
    m = n_frames
    k = np.arange(first, first + count, dtype=float)
    tk = (k * m + (m + 1) / 2.0) * t_frame_s  # mean read time of group k
    w = (tk - tk.mean()) / ((tk - tk.mean()) ** 2).sum()
    c = np.zeros(n_groups * m)
    for i, kk in enumerate(range(first, first + count)):
        c[kk * m:(kk + 1) * m] = w[i] / m
    return c


def _interval_weights(c: np.ndarray) -> np.ndarray:
    """D_i = sum_{j >= i} c_j: slope change per electron arriving in frame interval i (1/s)."""
    return np.cumsum(c[::-1])[::-1]


def slope_variance_factors(n_groups: int, n_frames: int, t_frame_s: float,
                           count: int | None = None) -> tuple[float, float]:
    """(a, b) with Var(slope) = a sigma_f^2 + b f for a fit to ``count`` groups.

    a = sum c_j^2 (1/s^2, per e-^2 of frame variance); b = t_f sum D_i^2 (1/s, per e-/s).
    """
    c = slope_weights(n_groups, n_frames, t_frame_s, 0, count)
    d = _interval_weights(c)
    return float((c * c).sum()), float(t_frame_s * (d * d).sum())


def apply_ipc(img: np.ndarray, alpha: float) -> np.ndarray:
    """Convolve with the IPC kernel [[0, a, 0], [a, 1 - 4a, a], [0, a, 0]] (zero outside)."""
    out = (1.0 - 4.0 * alpha) * img
    out[1:] += alpha * img[:-1]
    out[:-1] += alpha * img[1:]
    out[:, 1:] += alpha * img[:, :-1]
    out[:, :-1] += alpha * img[:, 1:]
    return out


def _cr_events(det: DetectorConfig, pixel_size_um: float, duration_s: float, n_intervals: int,
               rng: np.random.Generator, y0: float, x0: float, ny: int, nx: int):
    """Cosmic-ray events over the pixel rectangle rows y0 ... y0 + ny, columns x0 ... x0 + nx:
    (centre x, centre y, angle, length, charge, interval), each an array, positions in pixels."""
    area_cm2 = ny * nx * (pixel_size_um * 1e-4) ** 2
    n = int(rng.poisson(det.cosmic_ray_rate_cm2_s * area_cm2 * duration_s))
    cx = rng.uniform(x0 - 0.5, x0 + nx - 0.5, n)
    cy = rng.uniform(y0 - 0.5, y0 + ny - 0.5, n)
    theta = rng.uniform(0.0, np.pi, n)
    length = rng.uniform(0.0, _CR_MAX_LENGTH_PIX, n)
    q = det.cosmic_ray_charge_e * np.exp(_CR_SIGMA_LN * rng.standard_normal(n))
    interval = rng.integers(0, n_intervals, n)
    return cx, cy, theta, length, q, interval


def _dilate_cross(a: np.ndarray) -> np.ndarray:
    """``ndimage.binary_dilation(a)`` (the 3x3 cross, zero outside) by shifted slices."""
    out = a.copy()
    out[1:] |= a[:-1]
    out[:-1] |= a[1:]
    out[:, 1:] |= a[:, :-1]
    out[:, :-1] |= a[:, 1:]
    return out


def _dilate_square(a: np.ndarray) -> np.ndarray:
    """``ndimage.binary_dilation(a, structure=np.ones((3, 3)))`` by shifted slices."""
    rows = a.copy()
    rows[:, 1:] |= a[:, :-1]
    rows[:, :-1] |= a[:, 1:]
    out = rows.copy()
    out[1:] |= rows[:-1]
    out[:-1] |= rows[1:]
    return out


def _max_cross(a: np.ndarray) -> np.ndarray:
    """``ndimage.grey_dilation`` with the 3x3 cross footprint (mode reflect: an edge pixel's
    outside neighbour is itself) by shifted slices."""
    out = a.copy()
    np.maximum(out[1:], a[:-1], out=out[1:])
    np.maximum(out[:-1], a[1:], out=out[:-1])
    np.maximum(out[:, 1:], a[:, :-1], out=out[:, 1:])
    np.maximum(out[:, :-1], a[:, 1:], out=out[:, :-1])
    return out


def _cosmic_rays(shape, det: DetectorConfig, pixel_size_um: float, duration_s: float,
                 n_intervals: int, rng: np.random.Generator):
    """Charge image (e-) and arrival frame-interval index image of cosmic-ray events."""
    ev = _cr_events(det, pixel_size_um, duration_s, n_intervals, rng, 0, 0, *shape)
    return _deposit(shape, *ev)


def _deposit(shape, cx, cy, theta, length, q, interval):
    """Charge image (e-), arrival-interval image and event count of tracks (see _cr_events)
    on an image of ``shape`` (tracks are clipped at its edges)."""
    ny, nx = shape
    n = int(np.size(cx))
    if n == 0:
        return np.zeros(shape), np.full(shape, -1, dtype=np.int32), 0
    s = (np.arange(_CR_POINTS) + 0.5) / _CR_POINTS - 0.5
    # each of the _CR_POINTS points along a track carries q / _CR_POINTS, spread over the
    # four pixels around it with bilinear weights (those below 1e-3 dropped): one numba loop
    charge, when = pixelops.deposit(shape, cx, cy, theta, length, q / _CR_POINTS, interval, s)
    return charge, when, n


def _best_runs_one_break(n_ok: np.ndarray, kc: np.ndarray, skip: np.ndarray):
    """:func:`_best_runs` in closed form for ramps with groups ``0 ... n_ok - 1`` usable, at most
    one jump, before group ``kc`` (``kc`` = n_groups: none), and group ``kc`` itself unusable
    where ``skip``: the run before the jump, [0, min(kc, n_ok)), or the run after it,
    [kc + skip, n_ok); the earlier wins a tie (as in :func:`_best_runs`). :func:`expose` runs
    it per pixel in :func:`simfield.pixelops.refit`; this numpy form is its reference, as
    :func:`_dilate_square` and :func:`_max_cross` are for :func:`simfield.pixelops.jumps`."""
    la = np.minimum(kc, n_ok)
    sb = kc + skip.astype(np.int64)
    lb = np.maximum(n_ok - sb, 0)
    later = lb > la
    return np.where(later, sb, 0), np.where(later, lb, la)


def _best_runs(usable: np.ndarray, brk: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and length of the longest run of usable groups without a break inside it (any
    number of breaks; :func:`expose` uses its closed form :func:`_best_runs_one_break`, which
    the tests check against this scan).

    usable, brk : bool (n_pix, n_groups); brk[:, k] means a jump between groups k - 1 and k.
    """
    npix, n = usable.shape
    cur_len = np.zeros(npix, np.int64)
    cur_start = np.zeros(npix, np.int64)
    best_len = np.zeros(npix, np.int64)
    best_start = np.zeros(npix, np.int64)
    for k in range(n):
        cont = usable[:, k] & ~brk[:, k] & (cur_len > 0)
        cur_start = np.where(cont, cur_start, k)
        cur_len = np.where(usable[:, k], np.where(cont, cur_len + 1, 1), 0)
        better = cur_len > best_len
        best_len = np.where(better, cur_len, best_len)
        best_start = np.where(better, cur_start, best_start)
    return best_start, best_len


#: Side (pixels) of the detector blocks that carry their own noise streams (:class:`PixelNoise`).
NOISE_BLOCK = 128
#: Below this mean count a pixel's Poisson charge is drawn exactly (inverse CDF); above it
#: by the Cornish-Fisher expansion (see :meth:`PixelNoise.poisson`).
POISSON_EXACT_BELOW = 20.0


class PixelNoise:
    """Random numbers of one exposure tied to detector pixels, not to the window asking.

    The detector is cut into ``NOISE_BLOCK``-pixel blocks, each with its own streams
    ``(seed, *names, slot, row, column)``; a window of rows ``y0 ... y0 + shape[0]`` and columns
    ``x0 ...`` is cut from the blocks it touches. Two overlapping windows (neighbouring tiles of
    a mosaic) therefore see the same noise on the pixels they share, and a mosaic shows no seam.

    Parameters
    ----------
    seed : int
        Scenario seed.
    names : tuple of str or int
        The exposure's stream names, e.g. ``("exposure", band, k)``.
    y0, x0 : int (detector pixels)
        Window origin, 0-based.
    shape : (ny, nx)
        Window shape.
    """

    def __init__(self, seed: int, names: tuple, y0: int, x0: int, shape: tuple[int, int]):
        self.seed, self.names = int(seed), tuple(names)
        self.y0, self.x0 = int(y0), int(x0)
        self.shape = (int(shape[0]), int(shape[1]))

    def _blocks(self, pad: int = 0):
        b = NOISE_BLOCK
        y0, x0 = self.y0 - pad, self.x0 - pad
        y1, x1 = self.y0 + self.shape[0] + pad, self.x0 + self.shape[1] + pad
        for by in range(y0 // b, (y1 - 1) // b + 1):
            for bx in range(x0 // b, (x1 - 1) // b + 1):
                yield by, bx

    def _field(self, slot: str, uniform: bool = False) -> np.ndarray:
        from .random import stream

        b = NOISE_BLOCK
        out = np.empty(self.shape, np.float32)
        for by, bx in self._blocks():
            rng = stream(self.seed, *self.names, slot, by, bx)
            ys = slice(max(self.y0, by * b), min(self.y0 + self.shape[0], (by + 1) * b))
            xs = slice(max(self.x0, bx * b), min(self.x0 + self.shape[1], (bx + 1) * b))
            # a block's deviates fill it row by row: its first rows, up to the last one the
            # window reads, are the same numbers as the whole block's (tested)
            rows = (ys.stop - by * b, b)
            blk = rng.random(rows, np.float32) if uniform else rng.standard_normal(rows, np.float32)
            out[ys.start - self.y0:ys.stop - self.y0, xs.start - self.x0:xs.stop - self.x0] = \
                blk[ys.start - by * b:ys.stop - by * b, xs.start - bx * b:xs.stop - bx * b]
        return out

    def normal(self, slot: str) -> np.ndarray:
        """Standard normal deviates (float32) of the window, one per pixel."""
        return self._field(slot)

    def poisson(self, lam: np.ndarray) -> np.ndarray:
        """Poisson counts of mean ``lam`` (window-shaped), from the pixels' own deviates.

        One standard normal deviate z per pixel. Below :data:`POISSON_EXACT_BELOW` the exact
        inverse CDF of the uniform deviate u = Phi(z) (an integer); above it the Cornish-Fisher
        expansion lam + sqrt(lam) z + (z^2 - 1) / 6 (Cornish & Fisher 1938 [mem]), which has
        the Poisson mean, its skewness to O(lam^-1), variance lam + 1/18 and is continuous in
        lam, so the same pixel gets the same count whichever window draws it.
        """
        return self.poisson_scaled(lam, 1.0, 1.0)

    def poisson_scaled(self, f: np.ndarray, lam_scale: float, out_scale: float) -> np.ndarray:
        """``poisson(f lam_scale) out_scale`` (float32 products), in one fused pass."""
        f = np.asarray(f, np.float32)
        z = self._field("counts")
        out, n_small = pixelops.cornish_fisher(f, z, POISSON_EXACT_BELOW, lam_scale, out_scale)
        if n_small:
            from scipy import special, stats

            lam = f * np.float32(lam_scale)
            small = lam < POISSON_EXACT_BELOW
            out[small] = stats.poisson.ppf(special.ndtr(z[small].astype(float)),
                                           lam[small].astype(float)).astype(np.float32) \
                * np.float32(out_scale)
        return out

    def cosmic_rays(self, det: DetectorConfig, pixel_size_um: float, duration_s: float,
                    n_intervals: int):
        """Cosmic-ray charge (e-) and arrival-interval images of the window, and the number of
        events centred in it: each block draws its own events, and tracks from blocks next to
        the window reach into it."""
        from .random import stream

        b = NOISE_BLOCK
        parts = []
        for by, bx in self._blocks(pad=int(math.ceil(_CR_MAX_LENGTH_PIX)) + 1):
            if by < 0 or bx < 0:  # no detector there, no events
                continue
            ev = _cr_events(det, pixel_size_um, duration_s, n_intervals,
                            stream(self.seed, *self.names, "cosmic_rays", by, bx), by * b,
                            bx * b, b, b)
            parts.append(ev)
        cx, cy, theta, length, q, interval = (np.concatenate(v) for v in zip(*parts))
        cx, cy = cx - self.x0, cy - self.y0
        charge, when, _ = _deposit(self.shape, cx, cy, theta, length, q, interval)
        inside = ((cx > -0.5) & (cx < self.shape[1] - 0.5) & (cy > -0.5)
                  & (cy < self.shape[0] - 0.5))
        return charge, when, int(inside.sum())


class _GeneratorNoise:
    """The :class:`PixelNoise` interface on one Generator (draws in a fixed order)."""

    def __init__(self, rng: np.random.Generator, shape):
        self.rng, self.shape = rng, shape

    def normal(self, slot):
        return self.rng.standard_normal(self.shape, dtype=np.float32)

    def poisson(self, lam):
        return self.rng.poisson(lam).astype(np.float32)

    def poisson_scaled(self, f, lam_scale, out_scale):
        out = self.poisson(f * np.float32(lam_scale))
        out *= np.float32(out_scale)
        return out

    def cosmic_rays(self, det, pixel_size_um, duration_s, n_intervals):
        return _cosmic_rays(self.shape, det, pixel_size_um, duration_s, n_intervals, self.rng)


def _readout(det: DetectorConfig, exptime_s: float):
    """Readout constants: frame time (s), frame variance sig_f2 (e-^2), slope factors a_full
    (1/s^2) and b_full (1/s), interval weights D_i (1/s), IPC alpha and the pixel variance
    IPC keeps for white charge noise."""
    tf = frame_time(det, exptime_s)
    sig_f2 = frame_read_noise_e(det) ** 2 + \
        (det.gain_e_adu ** 2 / 12.0 if det.quantize else 0.0)
    c = slope_weights(det.n_groups, det.n_frames, tf)
    d_int = _interval_weights(c)
    alpha = det.ipc_alpha if det.ipc else 0.0
    ipc_var = (1.0 - 4.0 * alpha) ** 2 + 4.0 * alpha ** 2  # variance kept by IPC (uncorrelated)
    return tf, sig_f2, float((c * c).sum()), float(tf * (d_int * d_int).sum()), d_int, alpha, \
        ipc_var


def _dark_cal_var(det: DetectorConfig, a_full: float, b_full: float, sig_f2: float, ipc_var,
                  dark_true):
    """Variance ((e-/s)^2) of the calibration dark: one dark ramp's slope variance divided by
    the ``dark_cal_ramps`` averaged (0 ramps: a perfect dark); 0 without dark current."""
    if not det.dark_current or det.dark_cal_ramps == 0:
        return 0.0
    pois = b_full * ipc_var * dark_true if det.poisson else 0.0
    return (a_full * sig_f2 + pois) / det.dark_cal_ramps


def sky_noise_terms(det: DetectorConfig, exptime_s: float, sky_rate: float) -> tuple:
    """Variance of a calibrated source-free pixel, split by how it is correlated.

    Parameters
    ----------
    det : DetectorConfig
    exptime_s : float (s)
    sky_rate : float (e-/s per pixel)

    Returns
    -------
    white : float ((e-/s)^2)
        Read and quantisation noise, calibration-dark noise and flat-field error: independent
        from pixel to pixel.
    charge : float ((e-/s)^2)
        Shot noise of sky and dark before IPC; IPC spreads it over the neighbours with the
        kernel of :func:`apply_ipc`, so its pixel variance is ``charge`` x ((1 - 4 alpha)^2 +
        4 alpha^2) while a large aperture keeps all of it.
    alpha : float
        IPC coupling to each of the four neighbours (0 when IPC is off).

    The pixel variance ``white + charge x ipc kept`` equals ``Exposure.var_sky`` of
    :func:`expose` for a pixel with flat response (checked in the tests).
    """
    _, sig_f2, a_full, b_full, _, alpha, ipc_var = _readout(det, exptime_s)
    dark = det.dark_e_s if det.dark_current else 0.0
    charge = b_full * (sky_rate + dark) if det.poisson else 0.0
    flat = (det.flat_error_rms * sky_rate) ** 2 if det.flat else 0.0
    white = a_full * sig_f2 + _dark_cal_var(det, a_full, b_full, sig_f2, ipc_var, dark) + flat
    return float(white), float(charge), float(alpha)


def _fixed_terms(fixed: FixedPattern, det: DetectorConfig, dark, shape, a_full: float,
                 b_full: float, sig_f2: float, ipc_var: float, alpha: float) -> tuple:
    """What :func:`expose` needs of the detector alone, float32 images of ``shape`` or
    scalars: (response, calibration flat, true dark (e-/s), bad-pixel flags, variance of
    the calibration dark ((e-/s)^2), the calibration dark (e-/s))."""
    resp = fixed.flat if det.flat else np.ones(shape, np.float32)
    cal = fixed.flat_cal if det.flat else np.ones(shape, np.float32)
    if det.bad_pixels:
        resp = np.where(fixed.dead, 0.0, resp)
    dark_nom = det.dark_e_s if dark is None else dark
    dark_nom = np.asarray(dark_nom, np.float32) if det.dark_current else np.zeros(1, np.float32)
    dark_true = dark_nom + (fixed.hot_dark if det.bad_pixels else 0.0)
    dq = np.zeros(shape, np.int32)
    if det.bad_pixels:
        dq[fixed.hot] |= DQ_HOT
        dq[fixed.dead] |= DQ_DEAD
        if alpha > 0:
            bad = fixed.hot | fixed.dead
            near = _dilate_cross(bad) & ~bad  # the four neighbours (cross)
            dq[near] |= DQ_BAD_NEIGHBOUR
    # the reduction subtracts its calibration dark: every pixel's own dark after IPC, with the
    # noise of the dark ramps averaged into it (a fixed pattern of the detector)
    if det.dark_current:
        dark_seen = pixelops.ipc(np.broadcast_to(dark_true, shape), alpha) \
            if alpha > 0 else dark_true
        var_dcal = _dark_cal_var(det, a_full, b_full, sig_f2, ipc_var, dark_true)
        dark_cal = dark_seen + np.sqrt(var_dcal) * fixed.dark_z
    else:
        var_dcal, dark_cal = 0.0, 0.0
    own = [getattr(fixed, f) for f in ("flat", "flat_cal", "hot", "hot_dark", "dead", "dark_z")]
    for a in (resp, cal, dark_true, dq, var_dcal, dark_cal):  # made here: kept, not changed
        if isinstance(a, np.ndarray) and a.flags.owndata and not any(a is b for b in own):
            a.setflags(write=False)
    return resp, cal, dark_true, dq, var_dcal, dark_cal


def expose(rate: np.ndarray, sky_rate, dark, det: DetectorConfig, exptime_s: float,
           pixel_size_um: float, rng, fixed: FixedPattern) -> Exposure:
    """Simulate and calibrate one up-the-ramp exposure.

    Parameters
    ----------
    rate : ndarray (e-/s per detector pixel)
        Noiseless source signal (from :func:`simfield.survey.sample_scene`).
    sky_rate : float or ndarray (e-/s per pixel)
        Sky signal.
    dark : float or ndarray (e-/s) or None
        Dark current (None: ``det.dark_e_s``); the pipeline subtracts this known value.
    det : DetectorConfig
    exptime_s : float (s)
        Effective exposure time (slope baseline (n_groups - 1) t_g).
    pixel_size_um : float (micron)
        Physical pixel side (sets the cosmic-ray hit rate per pixel).
    rng : numpy.random.Generator or PixelNoise
        The exposure's own stream, or its pixel-tied noise (for windows of a large detector).
    fixed : FixedPattern
        The detector's fixed pattern, of the same shape as ``rate``.

    Returns
    -------
    Exposure
    """
    rate = np.asarray(rate, dtype=np.float32)  # images are float32 from here on
    require(rate.ndim == 2, "rate", rate.shape, "must be a 2-D image (e-/s per pixel)")
    require(fixed.flat.shape == rate.shape, "fixed", fixed.flat.shape,
            f"must have the image's shape {rate.shape}")
    check_range("exptime_s", exptime_s, 0, None, lo_open=True)
    check_range("pixel_size_um", pixel_size_um, 0, None, lo_open=True)
    lowest = float(rate.min())  # NaN where any pixel is NaN: refused too
    require(lowest >= 0, "rate", lowest, "must be >= 0 everywhere")
    if isinstance(rng, PixelNoise):
        require(rng.shape == rate.shape, "rng.shape", rng.shape,
                f"must be the image's shape {rate.shape}")
        noise = rng
    else:
        noise = _GeneratorNoise(rng, rate.shape)
    n, m = det.n_groups, det.n_frames
    tf, sig_f2, a_full, b_full, d_int, alpha, ipc_var = _readout(det, exptime_s)
    tg = m * tf
    n_int = n * m
    duration = n_int * tf

    # the detector's own terms (response, dark, its calibration, bad-pixel flags) depend on the
    # fixed pattern, not on the light: made once per window and detector settings
    key = (repr(det), a_full, b_full, sig_f2, ipc_var, alpha, rate.shape)
    terms = fixed.memo.get(key) if dark is None else None
    if terms is None:
        terms = _fixed_terms(fixed, det, dark, rate.shape, a_full, b_full, sig_f2, ipc_var,
                             alpha)
        if dark is None:
            fixed.memo.clear()
            fixed.memo[key] = terms
    resp, cal, dark_true, dq0, var_dcal, dark_cal = terms
    sky = np.asarray(sky_rate, dtype=np.float32)
    # expected e-/s without sources, f_sky = sky resp + dark, and with them, f = rate resp +
    # f_sky (one fused pass, simfield.pixelops)
    f_sky, f = pixelops.expected_rates(rate, resp, sky, dark_true)

    if det.poisson:
        # one scaled Poisson deviate with the slope's exact mean and variance (module notes)
        d_mean, d_sq = float(d_int.mean()), float((d_int * d_int).mean())
        scale = d_sq / d_mean
        slope = noise.poisson_scaled(f, duration * d_mean / scale, scale)
    else:
        slope = f.copy()
    dq = dq0.copy()

    n_cr = 0
    jump = None
    when = None
    if det.cosmic_rays and det.cosmic_ray_rate_cm2_s > 0:
        cr_q, when, n_cr = noise.cosmic_rays(det, pixel_size_um, duration, n_int)
        # float32 from here on (pixelops.ipc rounds a float64 image pixel by pixel)
        cr_q = pixelops.ipc(cr_q, alpha) if alpha > 0 else cr_q.astype(np.float32)
        # per pixel (simfield.pixelops.jumps): an IPC-spread deposit arrives with its
        # neighbour's event; a deposit above jump_threshold_sigma x the noise of a group
        # difference, sqrt(2 sig_f2 / m + f t_g), is detected, and hit neighbours of a
        # detected jump are refitted too, at the same time (common practice in ramp fitting:
        # the faint fringe of a track would otherwise stay in); an undetected deposit in
        # interval i adds charge x D_i to the fitted slope (already spread by IPC)
        when, jump, bias = pixelops.jumps(cr_q, when, alpha > 0, f, 2.0 * sig_f2 / m, tg,
                                          det.jump_threshold_sigma, d_int)
    z_read = noise.normal("read") if sig_f2 > 0 else None
    if alpha > 0 and z_read is not None:  # IPC, the faint-deposit bias and read noise fused
        slope = pixelops.ipc_noise(slope, alpha, bias if n_cr else None,
                                   math.sqrt(a_full * sig_f2), z_read)
    else:
        if alpha > 0:
            slope = pixelops.ipc(slope, alpha)
        if n_cr:
            slope += bias
        if z_read is not None:
            slope += np.float32(math.sqrt(a_full * sig_f2)) * z_read

    # group k is usable while the charge at its last read, f (k + 1) t_g, is below full well
    table_a = np.zeros(n + 1)
    table_b = np.zeros(n + 1)
    for cnt in range(2, n + 1):
        table_a[cnt], table_b[cnt] = slope_variance_factors(n, m, tf, cnt)
    # the refitted slope replaces the pixel's whole slope: its read-noise deviate, used
    # nowhere else, is free for it (a window-independent deviate of the pixel)
    z_fit = z_read if z_read is not None else noise.normal("refit")
    # per pixel (simfield.pixelops.refit, one scan): saturated where f n t_g >= full well,
    # groups below it n_ok; the jump's group kc (spoilt unless the jump falls on its first
    # frame); the longer of the runs before and after it (_best_runs_one_break); its slope
    # variance; sci ~ N(IPC f, that)
    n_refit, length = pixelops.refit(f, n * tg, det.full_well_e, det.saturation, jump, when,
                                     alpha, z_fit, n, m, tg, table_a, table_b, sig_f2,
                                     ipc_var, det.poisson, slope, dq,
                                     (DQ_SATURATED, DQ_COSMIC_RAY, DQ_NO_SLOPE))

    pois = ipc_var if det.poisson else 0.0
    # the calibration flat's error leaves -epsilon x signal, epsilon ~ N(0, flat_error_rms):
    # variance ferr2 x (signal / cal)^2, signal = (sky + rate) x resp = f - dark
    ferr2 = np.float32(det.flat_error_rms ** 2 if det.flat else 0.0)
    base = np.float32(a_full * sig_f2) + var_dcal  # read + calibration dark, before 1 / cal^2
    pb = np.float32(b_full * pois)
    # sci = (slope - dark_cal) / cal in place; var and var_sky = (pb f + base + ferr2
    # signal^2) / cal^2 at the expected rate and at the sky (one fused pass)
    sci = slope
    # (refitted pixels: sci = 0 without a slope, and the variance of their run, same pass)
    var, var_sky, artefact = pixelops.calibrate(
        sci, dark_cal, cal, f, f_sky, rate, resp, sky, base, pb, ferr2,
        bias if n_cr else None,
        (length, var_dcal, table_a, table_b, sig_f2, pois) if n_refit else None)
    return Exposure(sci=sci, var=var, var_sky=var_sky, dq=dq, exptime=float(exptime_s),
                    sky=float(np.mean(sky)), n_cr=int(n_cr), artefact=artefact)
