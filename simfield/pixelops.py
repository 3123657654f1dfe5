"""Fused per-pixel loops of the detector model (numba), for :mod:`simfield.detector`.

Each function does in one pass over the image what a chain of whole-image numpy operations
would do in several, with the same operations in the same order and the same precision
(float32 images, float32 constants; the Poisson expansion in float64), so the results equal
the numpy chains bit for bit (checked in tests/test_detector_fast.py). Units are those of the
caller: e-/s per pixel for rates and slopes, (e-/s)^2 for variances.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["ipc", "cornish_fisher", "expected_rates", "calibrate"]

_jit = numba.njit(cache=True, nogil=True)


@_jit
def _ipc(img, centre, alpha, out):
    ny, nx = img.shape
    for y in range(ny):
        for x in range(nx):
            v = centre * img[y, x]
            if y > 0:
                v += alpha * img[y - 1, x]
            if y < ny - 1:
                v += alpha * img[y + 1, x]
            if x > 0:
                v += alpha * img[y, x - 1]
            if x < nx - 1:
                v += alpha * img[y, x + 1]
            out[y, x] = v
    return out


def ipc(img: np.ndarray, alpha: float) -> np.ndarray:
    """:func:`simfield.detector.apply_ipc` of a float32 image in one pass (a new array)."""
    img = np.asarray(img, np.float32)
    return _ipc(img, np.float32(1.0 - 4.0 * alpha), np.float32(alpha),
                np.empty(img.shape, np.float32))


@_jit
def _cornish_fisher(lam, z, small_below, out):
    n_small = 0
    for y in range(lam.shape[0]):
        for x in range(lam.shape[1]):
            m = np.float64(lam[y, x])
            zz = np.float64(z[y, x])
            v = m + np.sqrt(m) * zz
            v += (zz * zz - 1.0) / 6.0
            out[y, x] = np.float32(max(v, 0.0))
            if m < small_below:
                n_small += 1
    return n_small


def cornish_fisher(lam: np.ndarray, z: np.ndarray, small_below: float):
    """Poisson counts lam + sqrt(lam) z + (z^2 - 1) / 6, clipped at 0, as float32 (computed
    in float64), and the number of pixels with lam < ``small_below`` (which the caller
    replaces by exact counts)."""
    out = np.empty(lam.shape, np.float32)
    n_small = _cornish_fisher(np.asarray(lam, np.float32), np.asarray(z, np.float32),
                              float(small_below), out)
    return out, n_small


@_jit
def _expected(rate, resp, sky, dark, f_sky, f):
    for y in range(rate.shape[0]):
        for x in range(rate.shape[1]):
            fs = sky[y, x] * resp[y, x] + dark[y, x]
            f_sky[y, x] = fs
            f[y, x] = rate[y, x] * resp[y, x] + fs


def expected_rates(rate, resp, sky, dark):
    """(f_sky, f) = (sky resp + dark, rate resp + f_sky), float32, e-/s; ``sky`` and ``dark``
    may be scalars or arrays broadcastable to ``rate``."""
    shape = rate.shape
    args = [np.broadcast_to(np.asarray(a, np.float32), shape) for a in (rate, resp, sky, dark)]
    f_sky, f = np.empty(shape, np.float32), np.empty(shape, np.float32)
    _expected(*args, f_sky, f)
    return f_sky, f


@_jit
def _calibrate(slope, dark_cal, cal, f, f_sky, rate, resp, sky, base, pb, ferr2, var, var_sky):
    one = np.float32(1.0)
    for y in range(slope.shape[0]):
        for x in range(slope.shape[1]):
            inv = one / cal[y, x]
            s = slope[y, x] - dark_cal[y, x]
            slope[y, x] = s * inv
            inv2 = inv * inv
            s_sky = sky[y, x] * resp[y, x]
            vs = pb * f_sky[y, x]
            vs += base[y, x]
            vs += ferr2 * s_sky * s_sky
            var_sky[y, x] = vs * inv2
            s_all = rate[y, x] * resp[y, x]
            s_all += s_sky
            v = pb * f[y, x]
            v += base[y, x]
            v += ferr2 * s_all * s_all
            var[y, x] = v * inv2


def calibrate(slope, dark_cal, cal, f, f_sky, rate, resp, sky, base, pb, ferr2):
    """In place: slope -> (slope - dark_cal) / cal (e-/s); returns (var, var_sky), the noise
    model pb f + base + ferr2 (signal)^2, over cal^2, at the expected rate and at the sky
    (``signal`` = rate resp + sky resp). Scalars or broadcastable arrays, float32."""
    shape = slope.shape
    b = [np.broadcast_to(np.asarray(a, np.float32), shape)
         for a in (dark_cal, cal, f, f_sky, rate, resp, sky, base)]
    var, var_sky = np.empty(shape, np.float32), np.empty(shape, np.float32)
    _calibrate(slope, *b, np.float32(pb), np.float32(ferr2), var, var_sky)
    return var, var_sky
