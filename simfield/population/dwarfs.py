"""Cool dwarf stars (late M, L and T types): the point-like contaminants of high-z samples.

Spectral types are coded as numbers, M0 = 10, L0 = 20, T0 = 30 (common practice), so M7 = 17,
L5.5 = 25.5, T8 = 38; drawn in half subtypes, a class (M7-M9.5, L0-L9.5, T0-T8) chosen with the
configured fractions, uniform within it.

Colours: published near-infrared colour trends with spectral type, in Vega magnitudes on the
MKO system (:data:`DWARF_COLOURS`, values read off the trends, all [mem]): Y-J from Hewett et
al. 2006, MNRAS 367, 454; J-H and H-K from the polynomial fits of Dupuy & Liu 2012, ApJS 201,
19; K-[3.6] from Patten et al. 2006, ApJ 651, 502; Teff from Stephens et al. 2009, ApJ 702, 154
and Filippazzo et al. 2015, ApJ 810, 158. J-H and H-K redden through the L types (dust in the
photosphere) and turn blue in the T types (CH4 and H2 collision-induced absorption in H and K),
while K-[3.6] keeps rising.

Mapping onto the project's bands: the colours become AB magnitudes at the filters' effective
wavelengths (:data:`ANCHOR_NM`) with the Vega-to-AB offsets of Hewett et al. 2006 (table 7,
Y 0.634, J 0.938, H 1.379, K 1.900 [mem]) and, for [3.6], 2.5 log10(3631 Jy / 280.9 Jy) = 2.779
from the 280.9 Jy Vega zero point of that band [mem]. Between the anchors the template is
ln f_nu linear in ln lambda (a piecewise power law); beyond the ends it continues with the end
segments' slopes. Band magnitudes are its synthetic photometry through each band, normalised
in the band nearest 1248 nm (the J-like band, where the surface densities are quoted). The
template ignores structure narrower than the anchors' spacing (the 1.4 and 1.9 micron water
bands between J, H and K, the 1.6 and 2.2 micron CH4 bands of T dwarfs): it reproduces the
published colours of bands near the anchors, and interpolates between them.

Units: magnitudes AB, wavelengths nm, temperatures K, densities per arcmin^2.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..bands import Band
from .seds import band_colours
from .stars import draw_star_magnitudes

__all__ = ["DWARF_COLOURS", "ANCHOR_NM", "VEGA_TO_AB", "J_LIKE_NM", "CLASS_RANGES", "Dwarfs",
           "spectral_type_name",
           "dwarf_teff", "anchor_ab_magnitudes", "dwarf_fnu", "dwarf_band_magnitudes",
           "j_like_band", "draw_spectral_types", "draw_dwarfs"]

#: Columns: spectral-type code, Y-J, J-H, H-K, K-[3.6] (Vega, MKO), Teff (K); all [mem].
DWARF_COLOURS = np.array([
    # code  Y-J    J-H    H-K   K-[3.6]  Teff
    [17.0, 0.55, 0.58, 0.37, 0.30, 2650.0],   # M7
    [19.0, 0.65, 0.63, 0.42, 0.38, 2400.0],   # M9
    [20.0, 0.75, 0.68, 0.50, 0.45, 2250.0],   # L0
    [23.0, 0.90, 0.85, 0.62, 0.60, 1850.0],   # L3
    [25.0, 0.95, 0.95, 0.70, 0.70, 1600.0],   # L5
    [28.0, 1.05, 1.00, 0.75, 0.85, 1400.0],   # L8
    [30.0, 1.10, 0.90, 0.65, 0.90, 1300.0],   # T0
    [32.0, 1.10, 0.65, 0.45, 1.00, 1250.0],   # T2
    [34.0, 1.05, 0.25, 0.05, 1.20, 1200.0],   # T4
    [35.0, 1.05, 0.05, -0.05, 1.35, 1100.0],  # T5
    [36.0, 1.00, -0.15, -0.10, 1.50, 1000.0],  # T6
    [38.0, 0.90, -0.35, -0.15, 1.80, 750.0],   # T8
])
#: Effective wavelengths (nm) of Y, J, H, K and [3.6], where the colours are anchored.
ANCHOR_NM = np.array([1031.0, 1248.0, 1631.0, 2201.0, 3550.0])
#: m_AB - m_Vega at the anchors (mag), see the module docstring.
VEGA_TO_AB = np.array([0.634, 0.938, 1.379, 1.900, 2.779])
#: The surface density and ``dwarf_mag_*`` refer to the band whose pivot is nearest this (nm).
J_LIKE_NM = 1248.0
#: Spectral-type code ranges (inclusive) of the classes M7-M9.5, L0-L9.5, T0-T8.
CLASS_RANGES = ((17.0, 19.5), (20.0, 29.5), (30.0, 38.0))


@dataclass(frozen=True)
class Dwarfs:
    """Drawn cool dwarfs.

    Attributes
    ----------
    mag : ndarray (AB mag)
        Magnitude in the J-like band.
    spectral_type : ndarray
        Spectral-type code (M0 = 10, L0 = 20, T0 = 30).
    teff : ndarray (K)
    """

    mag: np.ndarray
    spectral_type: np.ndarray
    teff: np.ndarray


def spectral_type_name(code) -> str:
    """'M7', 'L5.5', 'T8' ... of a spectral-type code."""
    code = float(code)
    letter = "MLT"[int(code // 10) - 1]
    sub = code - 10 * (code // 10)
    return f"{letter}{sub:g}"


def dwarf_teff(spectral_type):
    """Effective temperature (K) interpolated in :data:`DWARF_COLOURS`."""
    return np.interp(spectral_type, DWARF_COLOURS[:, 0], DWARF_COLOURS[:, 5])


def anchor_ab_magnitudes(spectral_type) -> np.ndarray:
    """AB magnitudes at :data:`ANCHOR_NM` relative to J, shape (n, 5) (mag)."""
    st = np.atleast_1d(np.asarray(spectral_type, dtype=float))
    c = [np.interp(st, DWARF_COLOURS[:, 0], DWARF_COLOURS[:, j]) for j in range(1, 5)]
    y_j, j_h, h_k, k_36 = c
    vega = np.column_stack([y_j, 0 * st, -j_h, -j_h - h_k, -j_h - h_k - k_36])
    return vega + VEGA_TO_AB[None, :] - VEGA_TO_AB[1]


def dwarf_fnu(wave_nm, spectral_type) -> np.ndarray:
    """Template f_nu (J-band AB flux 1, dimensionless), shape (n, n_wave): ln f_nu linear in
    ln lambda between the anchors, continued with the end slopes.

    Parameters
    ----------
    wave_nm : array_like (nm), shape (n_wave,)
    spectral_type : array_like, shape (n,)
    """
    lnf = -0.4 * np.log(10.0) * anchor_ab_magnitudes(spectral_type)
    lna = np.log(ANCHOR_NM)
    lnw = np.log(np.asarray(wave_nm, dtype=float))
    seg = np.clip(np.searchsorted(lna, lnw) - 1, 0, lna.size - 2)
    t = (lnw - lna[seg]) / (lna[seg + 1] - lna[seg])
    return np.exp(lnf[:, seg] * (1.0 - t) + lnf[:, seg + 1] * t)


def j_like_band(bands: Sequence[Band]) -> int:
    """Index of the band whose pivot is nearest :data:`J_LIKE_NM`."""
    return int(np.argmin([abs(b.pivot_nm - J_LIKE_NM) for b in bands]))


def dwarf_band_magnitudes(mag_j, spectral_type, bands: Sequence[Band]) -> np.ndarray:
    """AB magnitudes of dwarfs in every band, normalised in :func:`j_like_band`.

    Parameters
    ----------
    mag_j : array_like (AB mag), shape (n,)
        Magnitude in the J-like band.
    spectral_type : array_like, shape (n,)
    bands : sequence of Band

    Returns
    -------
    ndarray (AB mag), shape (n, n_band)
    """
    colour = band_colours(lambda wave: dwarf_fnu(wave, spectral_type), bands,
                          j_like_band(bands))
    return np.asarray(mag_j, dtype=float)[:, None] + colour


def draw_spectral_types(n: int, fractions, rng: np.random.Generator) -> np.ndarray:
    """Spectral-type codes: class by ``fractions`` (M7-M9.5, L0-L9.5, T0-T8; normalised here),
    then uniform in half subtypes within the class."""
    p = np.asarray(fractions, dtype=float)
    cls = rng.choice(3, size=int(n), p=p / p.sum())
    lo = np.array([r[0] for r in CLASS_RANGES])[cls]
    steps = np.array([2 * (r[1] - r[0]) + 1 for r in CLASS_RANGES])[cls]
    return lo + 0.5 * np.floor(rng.random(int(n)) * steps)


def draw_dwarfs(density_arcmin2: float, mag_min: float, mag_max: float, slope_dex: float,
                fractions, area_arcsec2: float, rng: np.random.Generator) -> Dwarfs:
    """Poisson number of cool dwarfs with J-like magnitudes and spectral types.

    Parameters
    ----------
    density_arcmin2 : float (arcmin^-2)
        Mean number per arcmin^2 between ``mag_min`` and ``mag_max`` in the J-like band.
    mag_min, mag_max : float (AB mag)
    slope_dex : float (dex/mag)
        Slope of the differential counts.
    fractions : sequence of 3 floats
        Relative numbers of M7-M9.5, L and T dwarfs.
    area_arcsec2 : float (arcsec^2)
    rng : numpy.random.Generator
    """
    n = int(rng.poisson(density_arcmin2 * area_arcsec2 / 3600.0))
    mag = draw_star_magnitudes(n, mag_min, mag_max, slope_dex, rng)
    st = draw_spectral_types(n, fractions, rng)
    return Dwarfs(mag=mag, spectral_type=st, teff=dwarf_teff(st))
