"""Wavefront drift between exposures: each exposure its own small segment error, so its own PSF.

Model: exposure ``e`` (0, 1, ... in the dither order) has the scenario's wavefront plus
``d_e = s_0 + ... + s_e``, a random walk of segment piston, tip and tilt whose steps ``s`` are
drawn like the static segment errors (:mod:`simfield.optics.pupil`) with rms ``step_nm`` over a
segment, from ``stream(seed, "optics", "drift")``; each exposure's net tilt is removed (image
motion is the pointing's). Exposure ``e``'s band PSF at the field centre, ``P_e``, is computed
directly; the changes ``P_e - P`` from the static PSF ``P`` are decomposed into ``n_modes``
eigen-PSFs ``m_k`` (SVD), ``P_e ~ P + sum_k c_ek m_k``. The change is taken to be the same
across the field (the drift is a pupil change; its cross term with the field aberrations is
second order), so exposure ``e`` samples ``scene + sum_k c_ek (light (x) m_k)``: ``n_modes``
extra whole-window convolutions per band, not one per exposure. Sources drawn with the large
PSF (brighter than ``telescope.psf.bright_mag``) keep the static PSF. The mosaic's effective
PSF is the mean over exposures (equal exposure times) of ``P + sum_k c_ek m_k``.
Units: nm (wavefront), arcsec (pixels); PSFs dimensionless, summing to 1 (modes to 0).
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from ..bands import Band
from ..config import TelescopeConfig
from ..random import stream
from .pupil import segment_centers

__all__ = ["DriftPSF", "drift_terms", "drift_psf_model", "drift_hdus"]


def drift_terms(tel: TelescopeConfig, seed: int, n_exposures: int) -> np.ndarray:
    """Segment piston, tip, tilt (nm) of every exposure's drift: shape (n_exposures,
    n_segments, 3), the cumulative sum of steps of rms ``tel.drift.step_nm`` per segment."""
    n_seg = len(segment_centers(tel))
    rng = stream(int(seed), "optics", "drift")
    steps = rng.standard_normal((int(n_exposures), n_seg, 3)) * (tel.drift.step_nm / np.sqrt(3))
    return np.cumsum(steps, axis=0)


@dataclass(frozen=True, eq=False)
class DriftPSF:
    """A band's exposure-to-exposure PSF changes.

    Attributes
    ----------
    modes : ndarray (dimensionless), shape (k, n, n)
        Eigen-PSFs of the changes (each sums to 0).
    coeffs : ndarray (dimensionless), shape (n_exposures, k)
        Exposure ``e``'s PSF is ``static + coeffs[e] @ modes``.
    mosaic : ndarray (dimensionless), shape (n, n)
        The mosaic's effective PSF at the field centre: mean of the exposures' PSFs.
    rms_change : ndarray (dimensionless), shape (n_exposures,)
        sum |P_e - P| of the directly computed exposure PSFs (fraction of the flux moved).
    """

    modes: np.ndarray
    coeffs: np.ndarray
    mosaic: np.ndarray
    rms_change: np.ndarray

    def exposure_psf(self, static: np.ndarray, e: int) -> np.ndarray:
        """Exposure ``e``'s PSF at the field centre as rendered (sums to 1)."""
        return static + np.tensordot(self.coeffs[e], self.modes, axes=1)


def drift_psf_model(tel: TelescopeConfig, band: Band, scale_arcsec: float,
                    radius_arcsec: float, seed: int, n_exposures: int, static: np.ndarray,
                    cache_dir: str | os.PathLike | None = None) -> DriftPSF:
    """Each exposure's band PSF (sampled, ``pixel_integrated=False``; disk-cached) and the
    eigen-PSFs of their differences from ``static`` (the scenario's PSF at the field centre,
    same sampling), keeping ``min(tel.drift.n_modes, n_exposures)``."""
    from .psf import cached_band_psf

    terms = drift_terms(tel, seed, n_exposures)
    d = np.stack([cached_band_psf(tel, band, scale_arcsec, radius_arcsec, seed, cache_dir,
                                  pixel_integrated=False, segment_terms_nm=t).image - static
                  for t in terms])
    n = static.shape[0]
    flat = d.reshape(len(terms), -1)
    _, _, vt = np.linalg.svd(flat, full_matrices=False)
    k = min(int(tel.drift.n_modes), len(terms))
    modes = vt[:k]
    coeffs = flat @ modes.T
    mosaic = static + (coeffs.mean(axis=0) @ modes).reshape(n, n)
    return DriftPSF(modes=modes.reshape(k, n, n), coeffs=coeffs, mosaic=mosaic,
                    rms_change=np.abs(flat).sum(axis=1))


def drift_hdus(model: DriftPSF | None, core) -> list:
    """HDUs for the PSF file: ``PSF_MOSAIC`` (the mosaic's effective PSF at the field centre,
    mean of the exposures') and ``PSF_EXPOSURES`` (each exposure's PSF as rendered), both of
    pixel ``core.scale_arcsec`` (arcsec) and unit sum; none without drift (``model`` None).

    ``core``: the static core :class:`~simfield.optics.psf.PSFImage` the drift is added to.
    """
    if model is None:
        return []
    from astropy.io import fits

    mos = fits.ImageHDU(model.mosaic.astype(np.float32), name="PSF_MOSAIC")
    exp = fits.ImageHDU(np.stack([model.exposure_psf(core.image, e)
                                  for e in range(model.coeffs.shape[0])]).astype(np.float32),
                        name="PSF_EXPOSURES")
    for h in (mos, exp):
        h.header["PIXSCALE"] = (core.scale_arcsec, "[arcsec] PSF pixel")
        h.header["NORM"] = ("sum=1", "each image normalised to unit sum")
    mos.header["PSFDESC"] = "mean of the exposures' PSFs (wavefront drift), field centre"
    exp.header["PSFDESC"] = "PSF of each exposure in dither order (wavefront drift)"
    mos.header["DRIFTMAX"] = (round(float(model.rms_change.max()), 6),
                              "largest sum|P_e - P| over exposures")
    return [mos, exp]
