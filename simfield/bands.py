"""Bandpasses, AB magnitudes and photon rates.

Units: wavelengths in nm, flux densities in nJy, collecting area in m^2, rates in e-/s.
The AB system (Oke & Gunn 1983, ApJ 266, 713): m = -2.5 log10(f_nu / 3631 Jy)
= 31.4 - 2.5 log10(f_nu / nJy).

A photon-counting detector behind a band of throughput T(lambda) registers
    N = A / h * integral f_nu(lambda) T(lambda) dlambda / lambda      [e-/s]
so a flat f_nu source gives N = A f_nu / h * integral T dlambda / lambda.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from astropy import constants as const

__all__ = [
    "AB_NJY_ZERO",
    "Band",
    "make_band",
    "make_bands",
    "ab_to_njy",
    "njy_to_ab",
    "mjy_sr_to_njy_arcsec2",
    "band_average_fnu",
]

#: AB magnitude of a 1 nJy source: -2.5 log10(1e-9 / 3631) = 31.4 (to 4e-5 mag).
AB_NJY_ZERO = 31.4

_H_PLANCK = const.h.si.value  # J s
_NJY_SI = 1e-35  # W m^-2 Hz^-1 per nJy
_ARCSEC2_PER_SR = (180.0 / np.pi * 3600.0) ** 2


def ab_to_njy(mag):
    """AB magnitude -> flux density in nJy."""
    return 10.0 ** (-0.4 * (np.asarray(mag, dtype=float) - AB_NJY_ZERO))


def njy_to_ab(flux):
    """Flux density in nJy -> AB magnitude (NaN for flux <= 0)."""
    flux = np.asarray(flux, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(flux > 0, AB_NJY_ZERO - 2.5 * np.log10(np.where(flux > 0, flux, 1.0)),
                        np.nan)


def mjy_sr_to_njy_arcsec2(value):
    """Surface brightness in MJy/sr -> nJy/arcsec^2 (1 MJy/sr = 2.3504e4 nJy/arcsec^2)."""
    return np.asarray(value, dtype=float) * 1e6 * 1e9 / _ARCSEC2_PER_SR


@dataclass(frozen=True, eq=False)
class Band:
    """A bandpass: total system throughput sampled on a wavelength grid.

    Attributes
    ----------
    name : str
        The project's name of the band.
    wave : ndarray (nm)
        Increasing wavelength grid.
    throughput : ndarray (dimensionless, 0..1)
        Total system throughput (optics x filter x detector QE) at ``wave``.
    sky_mjy_sr : float (MJy/sr)
        Sky (zodiacal) surface brightness in this band for the scenario's field.
    """

    name: str
    wave: np.ndarray
    throughput: np.ndarray
    sky_mjy_sr: float = 0.0
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def pivot_nm(self) -> float:
        """Pivot wavelength, lambda_p^2 = int T lambda dlambda / int T dlambda/lambda (nm)."""
        if "pivot" not in self._cache:
            num = np.trapezoid(self.throughput * self.wave, self.wave)
            den = np.trapezoid(self.throughput / self.wave, self.wave)
            self._cache["pivot"] = float(np.sqrt(num / den))
        return self._cache["pivot"]

    @property
    def width_nm(self) -> float:
        """Equivalent width int T dlambda / max(T) (nm)."""
        return float(np.trapezoid(self.throughput, self.wave) / self.throughput.max())

    @property
    def photon_integral(self) -> float:
        """int T(lambda) dlambda / lambda (dimensionless)."""
        return float(np.trapezoid(self.throughput / self.wave, self.wave))

    def rate_per_njy(self, area_m2: float) -> float:
        """Electron rate (e-/s) from a flat 1 nJy source through collecting area ``area_m2`` (m^2)."""
        return area_m2 * _NJY_SI / _H_PLANCK * self.photon_integral

    def zeropoint(self, area_m2: float) -> float:
        """AB magnitude giving 1 e-/s: ZP = 31.4 + 2.5 log10(e-/s per nJy)."""
        return AB_NJY_ZERO + 2.5 * np.log10(self.rate_per_njy(area_m2))

    def sky_rate(self, area_m2: float, pixel_arcsec: float) -> float:
        """Sky electron rate per pixel (e-/s) for a square pixel of side ``pixel_arcsec`` (arcsec)."""
        njy = mjy_sr_to_njy_arcsec2(self.sky_mjy_sr) * pixel_arcsec**2
        return float(njy * self.rate_per_njy(area_m2))

    def weights(self, wave_nm: np.ndarray) -> np.ndarray:
        """Weights w on the grid ``wave_nm`` (nm) such that <f_nu> = f_nu @ w.

        <f_nu> = int f_nu T dlambda/lambda / int T dlambda/lambda is the photon-weighted mean
        flux density, whose AB magnitude is the band's synthetic magnitude. Trapezoid rule.
        """
        wave_nm = np.asarray(wave_nm, dtype=float)
        t = np.interp(wave_nm, self.wave, self.throughput, left=0.0, right=0.0)
        dl = np.gradient(wave_nm) if wave_nm.size > 1 else np.ones(1)
        # trapezoid weights: half intervals at the ends
        tw = np.zeros_like(wave_nm)
        if wave_nm.size > 1:
            d = np.diff(wave_nm)
            tw[:-1] += 0.5 * d
            tw[1:] += 0.5 * d
        else:
            tw[:] = dl
        w = t / wave_nm * tw
        s = w.sum()
        if s <= 0:
            raise ValueError(f"band {self.name!r} has no throughput on the given wavelength grid")
        return w / s


def make_bands(sc) -> list[Band]:
    """The bands of a scenario (:class:`simfield.config.Scenario`, its ``telescope.bands``)
    as :class:`Band` objects."""
    return [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
            for b in sc.telescope.bands]


def make_band(name: str, center_nm: float, width_nm: float, peak_throughput: float,
              sky_mjy_sr: float = 0.0, edge_frac: float = 0.06, n: int = 401) -> Band:
    """A top-hat band with raised-cosine edges.

    Parameters
    ----------
    name : str
        Band name.
    center_nm, width_nm : float (nm)
        Centre and full width at half maximum of the throughput.
    peak_throughput : float
        Throughput on the flat top (0..1).
    sky_mjy_sr : float (MJy/sr)
        Sky surface brightness in the band.
    edge_frac : float
        Width of each cosine edge as a fraction of ``width_nm``.
    n : int
        Number of wavelength samples.
    """
    edge = edge_frac * width_nm
    lo, hi = center_nm - width_nm / 2, center_nm + width_nm / 2
    wave = np.linspace(lo - edge, hi + edge, n)
    t = np.ones_like(wave)
    for side, x0 in ((-1, lo), (1, hi)):
        # raised cosine from 1 at x0 - side*edge/2 ... 0 at x0 + side*edge/2; 0.5 at x0 (FWHM edge)
        u = side * (wave - x0) / edge + 0.5
        m = (u > 0) & (u < 1)
        t[m] = np.minimum(t[m], 0.5 * (1 + np.cos(np.pi * u[m])))
        t[u >= 1] = 0.0
    return Band(name=name, wave=wave, throughput=peak_throughput * t, sky_mjy_sr=sky_mjy_sr)


def band_average_fnu(f_nu: np.ndarray, wave_nm: np.ndarray, band: Band) -> np.ndarray:
    """Photon-weighted mean flux density in ``band`` of spectra ``f_nu`` (..., n_wave) in nJy."""
    return np.asarray(f_nu) @ band.weights(wave_nm)
