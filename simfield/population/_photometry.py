"""Distances and synthetic photometry shared by the galaxy families of one population draw.

Band magnitudes are the synthetic photometry of :func:`.seds.galaxy_fnu` (continuum and IGM),
optionally dimmed by dust (:mod:`.dust`, A_V per galaxy, at the rest wavelengths) and with
emission lines added to the band fluxes analytically (:func:`.lines.line_band_fnu`).

Units: wavelengths in nm, flux densities in nJy, magnitudes AB, distances Mpc.
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline

from ..bands import AB_NJY_ZERO
from ..cosmo import angular_diameter_distance
from .dust import attenuation_mag
from .lines import LINE_REST_NM, line_band_fnu, line_equivalent_widths
from .seds import band_weight_matrix, galaxy_fnu, rest_fnu_shape, wave_grid

_CHUNK = 4096  # galaxies per spectrum batch (4096 x ~400 wavelengths ~ 13 MB)


class Distances:
    """Angular-diameter distance and distance modulus by a cubic spline of ln D_A in ln(1+z),
    tabulated once per call from the astropy cosmology (300 nodes: < 1e-5 mag)."""

    def __init__(self, z_lo, z_hi, cosmo):
        u = np.linspace(np.log1p(0.9 * z_lo), np.log1p(1.01 * z_hi), 300)
        self._spline = CubicSpline(u, np.log(angular_diameter_distance(np.expm1(u), cosmo)))

    def d_a(self, z):
        """D_A (Mpc)."""
        return np.exp(self._spline(np.log1p(z)))

    def dm(self, z):
        """DM = 5 log10(D_A (1+z)^2 / 10 pc) (mag)."""
        return 5.0 * np.log10(self.d_a(z) * (1.0 + z) ** 2) + 25.0


class Photometry:
    """Wavelength grid, band weights and distances shared by every spectrum of one call.

    Parameters
    ----------
    bands : list of Band
    sel : int
        Index of the selection band.
    dist : Distances
    lines : LineParameters or None
        Emission-line ratios; None switches lines off.
    """

    def __init__(self, bands, sel, dist, lines=None):
        self.bands = list(bands)
        self.wave = wave_grid(bands)
        self.weights = band_weight_matrix(self.wave, bands)
        self.sel = sel
        self.dist = dist
        self.lines = lines
        used = self.weights[:, sel] > 0
        self.sel_wave = self.wave[used]
        self.sel_weights = self.weights[used][:, [sel]]

    def line_ews(self, ew_halpha, beta, brk, beta_opt):
        """Rest EWs (Angstrom) of every line, shape (n, n_line), from EW(Halpha)."""
        cont = rest_fnu_shape(LINE_REST_NM[None, :], beta[:, None], brk[:, None],
                              beta_opt[:, None])
        return line_equivalent_widths(ew_halpha, cont, self.lines)

    def mags(self, z, m_uv, beta, brk, beta_opt, selection_only=False, av=None,
             ew_halpha=None):
        """Band magnitudes (AB), shape (n, n_band), or (n, 1) in the selection band only.

        ``av`` (mag, per galaxy) applies Calzetti dust; ``ew_halpha`` (Angstrom, per galaxy)
        adds the lines if the line model is on. Computed in batches.
        """
        wave, w = (self.sel_wave, self.sel_weights) if selection_only else \
            (self.wave, self.weights)
        bands = [self.bands[self.sel]] if selection_only else self.bands
        out = np.empty((len(z), w.shape[1]))
        dm = self.dist.dm(z)
        with_lines = self.lines is not None and ew_halpha is not None
        for s in range(0, len(z), _CHUNK):
            sl = slice(s, s + _CHUNK)
            f = galaxy_fnu(wave, z[sl], m_uv[sl], beta[sl], brk[sl], beta_opt[sl],
                           dist_mod=dm[sl])
            if av is not None:
                f *= 10.0 ** (-0.4 * attenuation_mag(wave[None, :] / (1.0 + z[sl, None]),
                                                     av[sl, None]))
            band = f @ w
            if with_lines:
                band += self._line_fnu(z[sl], m_uv[sl], dm[sl], beta[sl], brk[sl],
                                       beta_opt[sl], None if av is None else av[sl],
                                       ew_halpha[sl], bands)
            with np.errstate(divide="ignore"):
                out[sl] = np.where(band > 0, AB_NJY_ZERO - 2.5 * np.log10(
                    np.where(band > 0, band, 1.0)), np.inf)
        return out

    def _line_fnu(self, z, m_uv, dm, beta, brk, beta_opt, av, ew_halpha, bands):
        """Band f_nu (nJy) of the lines: observed continuum at each line (after dust)."""
        m_1500 = m_uv + dm - 2.5 * np.log10(1.0 + z)
        f1500 = 10.0 ** (-0.4 * (m_1500 - AB_NJY_ZERO))
        cont = rest_fnu_shape(LINE_REST_NM[None, :], beta[:, None], brk[:, None],
                              beta_opt[:, None])
        ews = line_equivalent_widths(ew_halpha, cont, self.lines)
        cont_obs = f1500[:, None] * cont
        if av is not None:
            cont_obs = cont_obs * 10.0 ** (-0.4 * attenuation_mag(LINE_REST_NM[None, :],
                                                                  av[:, None]))
        return line_band_fnu(z, ews, cont_obs, bands)
