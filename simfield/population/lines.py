"""Nebular emission lines of star-forming galaxies, added to band fluxes analytically.

Equivalent widths (rest frame, Angstrom). The Halpha equivalent width of star-forming galaxies
rises with redshift as EW(Halpha) = a (1 + z)^s with s ~ 1.8 (Fumagalli et al. 2012, ApJ 757,
L22 [mem]; Faisst et al. 2016, ApJ 821, 122, find a similar rise to z ~ 5 [mem]); with
a = 20 A it gives ~70 A at z = 1, ~145 A at z = 2 and ~430 A at z = 4.5. Beyond ``z_cap`` it is
held constant (project choice), and each galaxy scatters log-normally about the relation
(``scatter_dex``, ~0.25 dex [mem]), capped at ``ew_max``. The other lines follow from flux
ratios to Halpha:

    Hbeta          = Halpha / 2.86   (case B at 10^4 K, Osterbrock & Ferland 2006, table 4.2)
    [OIII] 500.7   = R3 Hbeta        (R3 ~ 4 at z ~ 2-3, Steidel et al. 2014, ApJ 795, 165 [mem])
    [OIII] 495.9   = [OIII] 500.7 / 2.98   (Storey & Zeippen 2000, MNRAS 312, 813)
    [OII] 372.7    = R2 Hbeta        (R2 ~ 1.5 at z ~ 2, Shapley et al. 2015, ApJ 801, 88 [mem])

so the line flux of line j is F_j = r_j EW(Halpha) f_lambda,cont(Halpha) (rest frame). Dust
(:mod:`.dust`) dims lines and continuum alike, which keeps the equivalent widths.

Band flux of a line (the derivation :func:`line_band_fnu` uses). A line of rest equivalent
width W at rest wavelength lambda_0 is observed at lambda_o = lambda_0 (1 + z) with observed
equivalent width W (1 + z) and flux F = W (1 + z) f_lambda,cont(lambda_o), i.e.
f_lambda = F delta(lambda - lambda_o). A band's synthetic flux density (:mod:`simfield.bands`)
is the photon-weighted mean

    <f_nu> = int f_nu T dlambda/lambda / int T dlambda/lambda,   f_nu = f_lambda lambda^2 / c,

so the line adds F lambda_o T(lambda_o) / (c N) with N = int T dlambda/lambda; with
f_lambda,cont = c f_nu,cont / lambda_o^2 that is

    Delta <f_nu> = W (1 + z) f_nu,cont(lambda_o) T(lambda_o) / (lambda_o N).

Units: wavelengths in nm, equivalent widths in Angstrom (0.1 nm), flux densities in nJy.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..bands import Band

__all__ = ["LINE_NAMES", "LINE_REST_NM", "LineParameters", "halpha_ew_relation",
           "draw_halpha_ew", "line_flux_ratios", "line_equivalent_widths", "band_line_response",
           "line_band_fnu"]

#: Lines included (rest-frame vacuum wavelengths, nm).
LINE_NAMES = ("oii_3727", "hbeta", "oiii_4959", "oiii_5007", "halpha")
LINE_REST_NM = np.array([372.8, 486.13, 495.89, 500.68, 656.28])
_HA_HB = 2.86
_OIII_DOUBLET = 2.98
_NM_PER_ANGSTROM = 0.1


@dataclass(frozen=True)
class LineParameters:
    """Emission-line model (see the module docstring).

    Attributes
    ----------
    ew_a : float (Angstrom)
        EW(Halpha) at z = 0 of the (1 + z)^slope relation.
    ew_slope : float
        Power of (1 + z).
    z_cap : float
        Redshift beyond which the relation is held constant.
    scatter_dex : float (dex)
        Log-normal scatter about the relation.
    ew_max : float (Angstrom)
        Largest EW(Halpha) drawn.
    oiii_hbeta : float
        [OIII] 500.7 / Hbeta flux ratio.
    oii_hbeta : float
        [OII] 372.7 / Hbeta flux ratio.
    """

    ew_a: float = 20.0
    ew_slope: float = 1.8
    z_cap: float = 6.0
    scatter_dex: float = 0.25
    ew_max: float = 1500.0
    oiii_hbeta: float = 4.0
    oii_hbeta: float = 1.5


def halpha_ew_relation(z, par: LineParameters):
    """Median rest EW(Halpha) = a (1 + min(z, z_cap))^slope (Angstrom)."""
    zc = np.minimum(np.asarray(z, dtype=float), par.z_cap)
    return par.ew_a * (1.0 + zc) ** par.ew_slope


def draw_halpha_ew(z, par: LineParameters, deviates):
    """Rest EW(Halpha) (Angstrom) from standard-normal ``deviates`` clipped to +-3 sigma.

    Parameters
    ----------
    z : array_like
    par : LineParameters
    deviates : array_like, shape of ``z``
    """
    g = np.clip(np.asarray(deviates, dtype=float), -3.0, 3.0)
    return np.minimum(halpha_ew_relation(z, par) * 10.0 ** (par.scatter_dex * g), par.ew_max)


def line_flux_ratios(par: LineParameters) -> np.ndarray:
    """Flux of each line of :data:`LINE_NAMES` relative to Halpha (dimensionless)."""
    hb = 1.0 / _HA_HB
    o3 = par.oiii_hbeta * hb
    return np.array([par.oii_hbeta * hb, hb, o3 / _OIII_DOUBLET, o3, 1.0])


def line_equivalent_widths(ew_halpha, cont_fnu, par: LineParameters) -> np.ndarray:
    """Rest EWs (Angstrom) of the lines of :data:`LINE_NAMES`, shape (n, n_line).

    EW_j = F_j / f_lambda(lambda_j) = r_j EW(Halpha) f_lambda(Halpha) / f_lambda(lambda_j), with
    f_lambda ~ f_nu / lambda^2 and r_j from :func:`line_flux_ratios`.

    Parameters
    ----------
    ew_halpha : array_like (Angstrom), shape (n,)
    cont_fnu : array_like, shape (n, n_line)
        Continuum f_nu at the lines' rest wavelengths (any common unit).
    par : LineParameters
    """
    flam = np.asarray(cont_fnu, dtype=float) / LINE_REST_NM[None, :] ** 2
    ha = flam[:, -1:]
    return line_flux_ratios(par)[None, :] * np.asarray(ew_halpha, float)[:, None] * ha / flam


def band_line_response(band: Band, wave_obs_nm):
    """T(lambda_o) / (lambda_o N), N = int T dlambda/lambda, of one band (nm^-1).

    Parameters
    ----------
    band : Band
    wave_obs_nm : array_like (nm)
        Observed line wavelengths, any shape.
    """
    lam = np.asarray(wave_obs_nm, dtype=float)
    norm = np.trapezoid(band.throughput / band.wave, band.wave)
    t = np.interp(lam, band.wave, band.throughput, left=0.0, right=0.0)
    return t / (lam * norm)


def line_band_fnu(z, ew_rest_angstrom, cont_fnu_obs, bands: Sequence[Band]) -> np.ndarray:
    """Band-averaged f_nu added by lines (nJy), shape (n_gal, n_band).

    Parameters
    ----------
    z : array_like, shape (n_gal,)
    ew_rest_angstrom : array_like (Angstrom), shape (n_gal, n_line)
        Rest equivalent width of each line.
    cont_fnu_obs : array_like (nJy), shape (n_gal, n_line)
        Observed continuum f_nu at each line's observed wavelength (after dust).
    bands : sequence of Band
    """
    z = np.atleast_1d(np.asarray(z, dtype=float))
    lam_o = LINE_REST_NM[None, :] * (1.0 + z[:, None])
    w_obs_nm = np.asarray(ew_rest_angstrom, dtype=float) * _NM_PER_ANGSTROM * (1.0 + z[:, None])
    per_line = w_obs_nm * np.asarray(cont_fnu_obs, dtype=float)
    return np.column_stack([(per_line * band_line_response(b, lam_o)).sum(axis=1)
                            for b in bands])
