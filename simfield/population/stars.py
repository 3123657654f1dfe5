"""Foreground stars of a high-galactic-latitude field.

Differential number counts in the selection band rise as dN/dm ~ 10^(k m) with a slope
k ~ 0.1-0.2 dex/mag toward faint magnitudes at high galactic latitude (e.g. the star-count model
of Bahcall & Soneira 1980, ApJS 44, 73 [mem for the slope]); :func:`draw_star_magnitudes`
samples that law between a bright and a faint limit, so a field has a few bright stars and many
faint ones. Effective temperatures are log-uniform between 3000 and 7000 K (faint high-latitude
stars are mostly K and M dwarfs with some G stars, common practice) and colours are those of a
blackbody, B_nu(T) ~ nu^3 / (exp(h nu / k T) - 1), through the bands.

Units: magnitudes AB, temperatures K, wavelengths nm, densities per arcmin^2.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from astropy import constants as const

from ..bands import Band
from .seds import band_colours

__all__ = ["TEFF_RANGE_K", "Stars", "draw_star_magnitudes", "blackbody_fnu", "draw_stars",
           "star_band_magnitudes"]

#: Range of the log-uniform temperature distribution (K).
TEFF_RANGE_K = (3000.0, 7000.0)
_HC_K_NM = (const.h * const.c / const.k_B).si.value * 1e9  # h c / k = 1.4388e7 nm K


@dataclass(frozen=True)
class Stars:
    """Drawn stars.

    Attributes
    ----------
    mag : ndarray (AB mag)
        Magnitude in the selection band.
    teff : ndarray (K)
        Blackbody temperature.
    """

    mag: np.ndarray
    teff: np.ndarray


def draw_star_magnitudes(n: int, mag_min: float, mag_max: float, slope_dex: float,
                         rng: np.random.Generator) -> np.ndarray:
    """Magnitudes from dN/dm ~ 10^(slope_dex m) on [mag_min, mag_max] by inverse CDF (AB mag).

    With k = slope_dex ln 10, CDF(m) = (e^{k m} - e^{k m_min}) / (e^{k m_max} - e^{k m_min});
    written relative to m_max to avoid overflow.
    """
    u = rng.random(int(n))
    if slope_dex == 0:
        return mag_min + u * (mag_max - mag_min)
    k = slope_dex * np.log(10.0)
    a = np.exp(k * (mag_min - mag_max))
    return mag_max + np.log(a + u * (1.0 - a)) / k


def blackbody_fnu(wave_nm, teff_k):
    """Blackbody f_nu shape, nu^3 / (exp(h nu / k T) - 1) up to a constant (arbitrary units).

    Parameters
    ----------
    wave_nm : array_like (nm), shape (n_wave,)
    teff_k : array_like (K), shape (n_star,)

    Returns
    -------
    ndarray, shape (n_star, n_wave)
    """
    lam = np.asarray(wave_nm, dtype=float)[None, :]
    t = np.atleast_1d(np.asarray(teff_k, dtype=float))[:, None]
    return lam**-3 / np.expm1(_HC_K_NM / (lam * t))


def star_band_magnitudes(mag_sel, teff_k, bands: Sequence[Band], selection: int) -> np.ndarray:
    """AB magnitudes of blackbody stars in every band, normalised in band ``selection``.

    Parameters
    ----------
    mag_sel : array_like (AB mag), shape (n_star,)
    teff_k : array_like (K), shape (n_star,)
    bands : sequence of Band
    selection : int
        Index into ``bands`` of the band ``mag_sel`` refers to.

    Returns
    -------
    ndarray (AB mag), shape (n_star, n_band)
    """
    colour = band_colours(lambda wave: blackbody_fnu(wave, teff_k), bands, selection)
    return np.asarray(mag_sel, dtype=float)[:, None] + colour


def draw_stars(density_arcmin2: float, mag_min: float, mag_max: float, area_arcsec2: float,
               rng: np.random.Generator, slope_dex: float = 0.15) -> Stars:
    """Poisson number of stars with magnitudes and temperatures.

    Parameters
    ----------
    density_arcmin2 : float (arcmin^-2)
        Mean number of stars per arcmin^2 between ``mag_min`` and ``mag_max``.
    mag_min, mag_max : float (AB mag)
        Bright and faint limits in the selection band.
    area_arcsec2 : float (arcsec^2)
    rng : numpy.random.Generator
    slope_dex : float (dex/mag)
        Slope of the differential counts.
    """
    n = int(rng.poisson(density_arcmin2 * area_arcsec2 / 3600.0))
    mag = draw_star_magnitudes(n, mag_min, mag_max, slope_dex, rng)
    lo, hi = np.log(TEFF_RANGE_K[0]), np.log(TEFF_RANGE_K[1])
    teff = np.exp(lo + (hi - lo) * rng.random(n))
    return Stars(mag=mag, teff=teff)
