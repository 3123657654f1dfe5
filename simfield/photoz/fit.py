"""Chi-square template fitting of every object at once, and P(z).

For object i, template t and grid redshift z, with band fluxes F_b, errors s_b, weights
w_b = 1 / s_b^2 (0 for a missing band: NaN flux or error, or error <= 0) and template band
fluxes T_b(t, z), the best non-negative amplitude is the weighted least-squares one clipped at
zero, a = max(sum w F T / sum w T^2, 0), and

    chi2 = sum w F^2 - 2 a sum w F T + a^2 sum w T^2 = sum w F^2 - a sum w F T

(the second form holds for both the unclipped and the clipped a). Non-detections keep their
(possibly negative) fluxes, so an absent break is as informative as a present one.

P(z) is the likelihood marginalised over templates, sum_t exp(-chi2 / 2) x prior(t, z), as a
density per unit z normalised by the trapezoid rule on the grid (a flat prior in z when no
prior is given). Outputs: ``z_best`` the grid redshift where P(z) peaks (its mode), ``z_lo``
and ``z_hi`` the 15.87 and 84.13 % points of its CDF (a central 68.27 % interval, linear
between grid points), ``p_gt[c]`` = P(z > c), ``chi2_best`` the smallest chi2 of any
template and redshift and ``template_best`` its template index.

Units: fluxes and errors in nJy (any common unit works), redshifts dimensionless.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from ..errors import CatalogError
from .templates import TemplateSet

__all__ = ["PhotozResult", "Prior", "fit_photoz", "interval_quantiles"]

#: ``prior(amplitude, z) -> weights``: amplitude (nJy of rest-1500 A f_nu) of shape
#: (n_obj, n_t, n_z), z of shape (n_z,); non-negative weights broadcasting to the same shape.
Prior = Callable[[np.ndarray, np.ndarray], np.ndarray]

#: CDF levels of the central 68.27 % (one-sigma Gaussian) interval.
interval_quantiles = (0.158655, 0.841345)

# objects per chunk: the (chunk, n_t x n_z) work arrays stay near 2e6 elements (~16 MB each)
_CHUNK_ELEMENTS = 2_000_000


@dataclass(frozen=True)
class PhotozResult:
    """Photometric redshifts of n objects.

    Attributes
    ----------
    z : ndarray, shape (n_z,)
        Redshift grid.
    pz : ndarray (per unit z), shape (n, n_z), float32
        P(z), integrating to 1 over the grid (trapezoid rule).
    z_best, z_lo, z_hi : ndarray, shape (n,)
        Mode and central 68 % interval of P(z).
    chi2_best : ndarray, shape (n,)
        Smallest chi2 over templates and redshifts.
    template_best : ndarray of int, shape (n,)
        Template index of ``chi2_best``.
    n_bands : ndarray of int, shape (n,)
        Bands used (finite flux, finite positive error).
    p_gt : dict of float -> ndarray, shape (n,)
        P(z > cut) for each cut.
    """

    z: np.ndarray
    pz: np.ndarray
    z_best: np.ndarray
    z_lo: np.ndarray
    z_hi: np.ndarray
    chi2_best: np.ndarray
    template_best: np.ndarray
    n_bands: np.ndarray
    p_gt: dict


def _check_inputs(flux, flux_err, templates: TemplateSet):
    flux = np.asarray(flux, dtype=float)
    err = np.asarray(flux_err, dtype=float)
    nb = len(templates.bands)
    if flux.ndim != 2 or flux.shape[1] != nb:
        raise CatalogError(f"flux has shape {flux.shape}: must be (n_objects, {nb}) for bands "
                           f"{', '.join(templates.bands)}")
    if err.shape != flux.shape:
        raise CatalogError(f"flux_err has shape {err.shape}: must equal flux's {flux.shape}")
    return flux, err


def _cdf(pz, z):
    """Cumulative trapezoid integral of each row of ``pz`` over ``z``, shape (n, n_z)."""
    seg = 0.5 * (pz[:, 1:] + pz[:, :-1]) * np.diff(z)
    return np.concatenate([np.zeros((pz.shape[0], 1)), np.cumsum(seg, axis=1)], axis=1)


def _quantile(cdf, z, q):
    """Redshift where each row of ``cdf`` (non-decreasing, 0 ... 1) reaches ``q`` in (0, 1)."""
    k = np.clip(np.sum(cdf < q, axis=1), 1, z.size - 1)
    rows = np.arange(cdf.shape[0])
    c0, c1 = cdf[rows, k - 1], cdf[rows, k]
    frac = np.clip((q - c0) / np.where(c1 > c0, c1 - c0, 1.0), 0.0, 1.0)
    return z[k - 1] + frac * (z[k] - z[k - 1])


def _fit_chunk(flux, w, tflat, tflat2, nt, nz, z, prior):
    wf = w * flux
    sff = np.sum(wf * flux, axis=1)
    sft = wf @ tflat.T  # (c, n_t n_z)
    stt = w @ tflat2.T  # 0 only where every used band of the template is 0, and then sft = 0
    pos = stt > 0
    amp = None
    if prior is not None:
        amp = np.divide(np.maximum(sft, 0.0), stt, out=np.zeros_like(sft), where=pos)
    # chi2 = sff - a sft with a = max(sft, 0) / stt
    np.maximum(sft, 0.0, out=sft)
    sft *= sft
    np.divide(sft, stt, out=sft, where=pos)
    sft[~pos] = 0.0
    chi2 = np.subtract(sff[:, None], sft, out=sft)
    np.maximum(chi2, 0.0, out=chi2)
    best = np.argmin(chi2, axis=1)
    chi2_best = chi2[np.arange(chi2.shape[0]), best]
    chi2 -= chi2_best[:, None]
    chi2 *= -0.5
    like = np.exp(chi2, out=chi2).reshape(-1, nt, nz)
    if prior is not None:
        like = like * prior(amp.reshape(-1, nt, nz), z)
    return like.sum(axis=1), chi2_best, best // nz


def fit_photoz(flux, flux_err, templates: TemplateSet, z_cuts: Sequence[float] = (),
               prior: Prior | None = None) -> PhotozResult:
    """Fit every object with every template at every grid redshift.

    Parameters
    ----------
    flux, flux_err : array_like (nJy), shape (n, n_b)
        Band fluxes and their 1-sigma errors, bands in the order of ``templates.bands``.
        A NaN flux or a NaN or non-positive error marks the band missing for that object.
    templates : TemplateSet
    z_cuts : sequence of float
        Redshifts c for which P(z > c) is returned.
    prior : Prior, optional
        Weights of templates and redshifts (e.g. :func:`simfield.photoz.prior.luminosity_prior`);
        default: flat in z and over templates.

    Returns
    -------
    PhotozResult
    """
    flux, err = _check_inputs(flux, flux_err, templates)
    z = templates.z
    nt, nz, nb = templates.flux.shape
    ok = np.isfinite(flux) & np.isfinite(err) & (err > 0)
    w = np.where(ok, 1.0 / np.where(ok, err, 1.0) ** 2, 0.0)
    f = np.where(ok, flux, 0.0)
    tflat = templates.flux.reshape(nt * nz, nb)
    tflat2 = tflat**2
    n = flux.shape[0]
    pz = np.empty((n, nz))
    chi2_best = np.empty(n)
    tbest = np.empty(n, dtype=int)
    step = max(1, _CHUNK_ELEMENTS // (nt * nz))
    for s in range(0, n, step):
        sl = slice(s, s + step)
        pz[sl], chi2_best[sl], tbest[sl] = _fit_chunk(f[sl], w[sl], tflat, tflat2, nt, nz, z,
                                                      prior)
    area = _cdf(pz, z)[:, -1]
    pz /= np.where(area > 0, area, 1.0)[:, None]
    cdf = _cdf(pz, z)
    p_gt = {float(c): 1.0 - _interp_rows(c, z, cdf) for c in z_cuts}
    return PhotozResult(
        z=z, pz=pz.astype(np.float32), z_best=z[np.argmax(pz, axis=1)],
        z_lo=_quantile(cdf, z, interval_quantiles[0]),
        z_hi=_quantile(cdf, z, interval_quantiles[1]),
        chi2_best=chi2_best, template_best=tbest, n_bands=ok.sum(axis=1), p_gt=p_gt)


def _interp_rows(x, z, cdf):
    """Each row of ``cdf`` linearly interpolated at the redshift ``x``."""
    k = int(np.clip(np.searchsorted(z, x), 1, z.size - 1))
    frac = (x - z[k - 1]) / (z[k] - z[k - 1])
    return cdf[:, k - 1] + np.clip(frac, 0.0, 1.0) * (cdf[:, k] - cdf[:, k - 1])
