"""The noise correlation of a drizzled mosaic, and the noise of apertures it implies.

Per pixel the mosaic's inverse variance is exact (drizzle propagates the exposures' variances
with squared weights), but its pixels are correlated: a detector pixel's drop covers several
mosaic pixels, and inter-pixel capacitance (IPC) has already spread each detector pixel's shot
noise over its four neighbours (read noise is added after IPC and stays white). For an
aperture with weights m(x),

    Var(sum) = sigma_pix^2 sum_lag rho(lag) A(lag),   A(lag) = sum_x m(x) m(x + lag),

with rho the correlation coefficient of neighbouring pixels at that lag. A user forms the
prediction sum_x m(x) sigma_pix^2 (the aperture sum of the variance map), so the factor by
which the aperture noise exceeds its square root is F = sqrt(sum rho A / sum m); for large
apertures it tends to sqrt(sum rho).

rho is found by drizzling pure noise through the run's own geometry: the same exposure grids
(dithers, sub-pixel phases, roll), drizzle kernel and pixfrac, on a patch at the mosaic centre,
with each exposure's noise built as white + IPC-correlated charge noise in the proportions the
detector model gives (:func:`simfield.detector.sky_noise_terms`). The drizzle part alone can
be compared with Casertano et al. (2000, AJ 120, 2747, appendix A); the tests also compare F
with the scatter of empty apertures measured on written mosaics.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, signal

from ..grid import Grid
from .depth import disk_weights
from .drizzle import drizzle_mosaic

__all__ = ["NoiseCorrelation", "APERTURE_RADII_PIX", "drizzle_noise_covariance", "noise_correlation",
           "aperture_factors", "drizzle_field_covariance"]

#: Radii (mosaic pixels) of the aperture noise table written into the mosaic headers.
APERTURE_RADII_PIX = (1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0, 15.0, 20.0)


@dataclass(frozen=True, eq=False)
class NoiseCorrelation:
    """Correlation of mosaic pixel noise and the aperture noise factors it implies.

    Attributes
    ----------
    rho : ndarray (dimensionless), shape (2K+1, 2K+1)
        Correlation coefficient at each lag (centre = 1), rows along y.
    radii_pix : ndarray (mosaic pixels)
    factors : ndarray (dimensionless)
        F(r) for circular apertures of those radii.
    factor_inf : float (dimensionless)
        F for large areas, sqrt(sum rho).
    """

    rho: np.ndarray
    radii_pix: np.ndarray
    factors: np.ndarray
    factor_inf: float


@dataclass(frozen=True, eq=False)
class _NoiseExposure:
    sci: np.ndarray
    var: np.ndarray
    var_sky: np.ndarray
    dq: np.ndarray
    exptime: float = 1.0
    sky: float = 0.0


def _ipc_kernel(alpha: float) -> np.ndarray:
    return np.array([[0, alpha, 0], [alpha, 1 - 4 * alpha, alpha], [0, alpha, 0]], np.float32)


def _covering_window(g: Grid, target: Grid, pad: int = 3) -> Grid:
    xi, eta = target.pixel_offsets()
    x, y = g.offsets_to_pixel(xi[[0, 0, -1, -1], [0, -1, 0, -1]],
                              eta[[0, 0, -1, -1], [0, -1, 0, -1]])
    x0, y0 = math.floor(x.min()) - pad, math.floor(y.min()) - pad
    x1, y1 = math.ceil(x.max()) + pad + 1, math.ceil(y.max()) + pad + 1
    return g.window(x0, y0, x1 - x0, y1 - y0)


def _noise_exposure(z: np.ndarray) -> _NoiseExposure:
    """An exposure holding the noise ``z`` (e-/s) with unit variance and no flags."""
    v = np.ones(z.shape, np.float32)
    return _NoiseExposure(z, v, v, np.zeros(z.shape, np.int32))


def _noise_patch(exp_grids: list[Grid], mosaic_grid: Grid, patch: int) -> tuple:
    """The square patch of side ``patch`` (mosaic pixels, smaller if the mosaic is) at the
    mosaic centre, and the window of each exposure grid covering it."""
    n = int(min(patch, mosaic_grid.nx, mosaic_grid.ny))
    pg = mosaic_grid.window((mosaic_grid.nx - n) // 2, (mosaic_grid.ny - n) // 2, n, n)
    return pg, [_covering_window(g, pg) for g in exp_grids]


def _lag_covariance(mosaics, k: int, cut: int, subtract_mean: bool) -> np.ndarray:
    """Covariance of mosaic pixels at lags up to ``k`` (mosaic pixels), from realisations.

    Each drizzled realisation in ``mosaics`` loses a rim of ``cut`` pixels; its covered pixels
    (weight > 0), less their mean with ``subtract_mean``, are autocorrelated by FFT. Products
    and pair counts are summed over the realisations, divided, and made symmetric
    (C(lag) = C(-lag), which halves the estimate's noise).

    Returns
    -------
    ndarray, shape (2k+1, 2k+1) (square of the mosaic's unit, e.g. (e-/s)^2)
    """
    num = np.zeros((2 * k + 1, 2 * k + 1))
    cnt = np.zeros_like(num)
    for m in mosaics:
        good = (m.wht > 0)[cut:-cut, cut:-cut]
        u = m.sci.astype(float)[cut:-cut, cut:-cut]
        u = np.where(good, u - (u[good].mean() if subtract_mean else 0.0), 0.0)
        g = good.astype(float)
        full_u = signal.fftconvolve(u, u[::-1, ::-1], mode="full")
        full_g = signal.fftconvolve(g, g[::-1, ::-1], mode="full")
        cy, cx = u.shape[0] - 1, u.shape[1] - 1
        # a patch narrower than the lags has no pairs beyond its width: those lags stay 0
        ky, kx = min(k, cy), min(k, cx)
        into = (slice(k - ky, k + ky + 1), slice(k - kx, k + kx + 1))
        num[into] += full_u[cy - ky:cy + ky + 1, cx - kx:cx + kx + 1]
        cnt[into] += np.round(full_g[cy - ky:cy + ky + 1, cx - kx:cx + kx + 1])
    cov = num / np.maximum(cnt, 1)
    return 0.5 * (cov + cov[::-1, ::-1])


def aperture_factors(rho: np.ndarray, radii_pix) -> np.ndarray:
    """F(r) for circular apertures of each radius (mosaic pixels), given the correlation rho.

    F(r)^2 = sum_lag rho(lag) A(lag) / sum_x m(x), with m the aperture's exact pixel-overlap
    weights (photutils) and A their autocorrelation: the aperture sum's variance over the sum
    of pixel variances inside the aperture (``aperture_photometry`` of the variance map, the
    way a user forms it). Averaged over four sub-pixel positions of the centre.
    """
    k = rho.shape[0] // 2
    out = []
    for r in radii_pix:
        num = den = 0.0
        for dx, dy in ((0.0, 0.0), (0.5, 0.0), (0.0, 0.5), (0.5, 0.5)):
            m = disk_weights(float(r), dx, dy)
            a = signal.correlate(np.pad(m, k), np.pad(m, k), mode="full")
            ca = a.shape[0] // 2
            num += float((rho * a[ca - k:ca + k + 1, ca - k:ca + k + 1]).sum())
            den += float(m.sum())
        out.append(math.sqrt(num / den))
    return np.asarray(out)


def drizzle_noise_covariance(exp_grids: list[Grid], mosaic_grid: Grid, kernel: str,
                             pixfrac: float, ipc_alpha: float, rng: np.random.Generator,
                             patch: int = 256, realisations: int = 3) -> tuple:
    """Covariance of mosaic pixels at each lag for unit white and unit charge noise.

    Drizzles pure noise through the run's geometry twice: white noise of unit variance in every
    detector pixel, and unit-variance charge noise spread by the IPC kernel of ``ipc_alpha``.
    Both pass through the same (uniformly weighted) drizzle, which is linear, so a detector
    whose pixel noise is ``white`` plus ``charge`` variance gives the covariance
    ``white x cov_white + charge x cov_charge`` (:func:`noise_correlation`).

    Parameters
    ----------
    exp_grids : list of Grid
        The run's exposure grids.
    mosaic_grid : Grid
    kernel : str
    pixfrac : float
        Drizzle settings, as for :func:`simfield.survey.drizzle_mosaic`.
    ipc_alpha : float
        IPC coupling to each neighbour (0: none).
    rng : numpy.random.Generator
    patch : int (mosaic pixels)
        Side of the patch at the mosaic centre (smaller if the mosaic is).
    realisations : int
        Noise realisations averaged.

    Returns
    -------
    cov_white, cov_charge : ndarray, shape (2K+1, 2K+1) ((e-/s)^2 per unit input variance)
    """
    ratio = exp_grids[0].scale / mosaic_grid.scale  # detector pixel in mosaic pixels
    # farthest lag two mosaic pixels can share noise at: one drop (pixfrac detector pixels)
    # plus the IPC neighbour; the smooth kernels reach further. Lags beyond hold only the
    # estimate's own noise, so they are left out.
    reach = ratio * (pixfrac + 1) + (2 if kernel in ("gaussian", "lanczos3") else 0)
    k = int(min(10, max(1, math.ceil(reach - 1e-9))))
    pg, wins = _noise_patch(exp_grids, mosaic_grid, patch)
    covs = []
    for ipc in (0.0, ipc_alpha):
        def mosaics():
            for _ in range(realisations):
                def exposures():
                    for w in wins:
                        z = rng.standard_normal(w.shape, np.float32)
                        if ipc > 0:
                            z = ndimage.correlate(z, _ipc_kernel(ipc), mode="constant")
                        yield _noise_exposure(z)

                yield drizzle_mosaic(exposures(), wins, pg, kernel, pixfrac, subtract_sky=False)

        covs.append(_lag_covariance(mosaics(), k, cut=k + 2, subtract_mean=True))
    if ipc_alpha == 0:  # the charge noise is white too
        covs[1] = covs[0]
    return covs[0], covs[1]


def drizzle_field_covariance(exp_grids: list[Grid], mosaic_grid: Grid, kernel: str,
                             pixfrac: float, field, k: int, realisations: int,
                             patch: int = 256, subtract_mean: bool = True) -> np.ndarray:
    """Covariance of mosaic pixels at lags up to ``k`` of a noise field given per exposure.

    Like :func:`drizzle_noise_covariance`, but each exposure's noise comes from
    ``field(i, box, r)``: the noise (e-/s) of exposure ``i`` on its detector window ``box`` =
    (y0, y1, x0, x1), realisation ``r``. With ``subtract_mean`` each realisation's mean over
    the patch is taken out first: the covariance then describes the scatter from place to
    place within a field of about the patch's size (what empty apertures spread over a mosaic
    measure), not the part common to the whole patch.

    Returns
    -------
    ndarray, shape (2k+1, 2k+1) ((e-/s)^2)
    """
    pg, wins = _noise_patch(exp_grids, mosaic_grid, patch)
    boxes = []
    for g, w in zip(exp_grids, wins):
        x0, y0 = (int(round(v)) for v in g.offsets_to_pixel(*w.pixel_to_offsets(0, 0)))
        boxes.append((y0, y0 + w.ny, x0, x0 + w.nx))

    def mosaics():
        for r in range(realisations):
            def exposures():
                for i in range(len(wins)):
                    yield _noise_exposure(np.asarray(field(i, boxes[i], r), np.float32))

            yield drizzle_mosaic(exposures(), wins, pg, kernel, pixfrac, subtract_sky=False)

    return _lag_covariance(mosaics(), k, cut=3, subtract_mean=subtract_mean)


def _pad_lags(cov: np.ndarray, k: int) -> np.ndarray:
    """A lag array padded with zeros to lags up to ``k``."""
    cov = np.asarray(cov, float)
    p = k - cov.shape[0] // 2
    return np.pad(cov, p) if p > 0 else cov


def noise_correlation(cov_white: np.ndarray, cov_charge: np.ndarray, white_var: float,
                      charge_var: float, cov_extra: np.ndarray | None = None) -> NoiseCorrelation:
    """Correlation and aperture factors of a mosaic whose detector pixels carry ``white_var``
    and ``charge_var`` ((e-/s)^2, :func:`simfield.detector.sky_noise_terms`), from the
    covariances of :func:`drizzle_noise_covariance`, plus ``cov_extra`` ((e-/s)^2 at lags,
    e.g. :func:`drizzle_field_covariance` of correlated read noise; may reach further)."""
    cov = white_var * np.asarray(cov_white, float) + charge_var * np.asarray(cov_charge, float)
    if cov_extra is not None:
        k = max(cov.shape[0], np.shape(cov_extra)[0]) // 2
        cov = _pad_lags(cov, k) + _pad_lags(cov_extra, k)
    k = cov.shape[0] // 2
    rho = cov / cov[k, k]
    radii = np.asarray(APERTURE_RADII_PIX)
    return NoiseCorrelation(rho=rho.astype(np.float32), radii_pix=radii,
                            factors=aperture_factors(rho, radii),
                            factor_inf=float(math.sqrt(max(rho.sum(), 1e-12))))
