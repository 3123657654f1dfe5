"""Dust attenuation of galaxy spectra: the Calzetti et al. 2000 starburst curve.

Calzetti et al. 2000, ApJ 533, 682, eq. 4, with l the rest wavelength in micron and
R_V = 4.05 (their eq. 5):

    k(l) = 2.659 (-2.156 + 1.509/l - 0.198/l^2 + 0.011/l^3) + R_V    0.12 <= l < 0.63
    k(l) = 2.659 (-1.857 + 1.040/l) + R_V                            0.63 <= l <= 2.20

and A(l) = k(l) E(B-V) = A_V k(l) / R_V (mag). Outside the paper's range the curve is
continued as a power law from its ends, k ~ l^-1.75 redward of 2.2 micron (the near-infrared
extinction law, e.g. Draine 1989 [mem]) and with the local slope of eq. 4 blueward of
0.12 micron (project choice: rest wavelengths < 120 nm matter only below the Lyman-alpha
absorption of the IGM).

Written here rather than taken from a library: the ``dust-extinction`` package (1.7) holds
Milky-Way and Magellanic extinction curves, not this attenuation curve.

Units: wavelengths in nm, attenuations in mag.
"""

from __future__ import annotations

import numpy as np

__all__ = ["CALZETTI_RV", "calzetti_k", "attenuation_mag"]

#: Total-to-selective attenuation of Calzetti et al. 2000 (eq. 5).
CALZETTI_RV = 4.05
_L_BLUE, _L_MID, _L_RED = 0.12, 0.63, 2.20  # micron, ends of the two pieces of eq. 4
_NIR_POWER = -1.75


def _k_uv(l):
    return 2.659 * (-2.156 + 1.509 / l - 0.198 / l**2 + 0.011 / l**3) + CALZETTI_RV


def _k_opt(l):
    return 2.659 * (-1.857 + 1.040 / l) + CALZETTI_RV


def calzetti_k(wave_rest_nm):
    """Calzetti et al. 2000 k(lambda) = A(lambda) / E(B-V) (eq. 4, R_V = 4.05; dimensionless).

    Parameters
    ----------
    wave_rest_nm : array_like (nm)
        Rest-frame wavelengths; any shape.

    Returns
    -------
    ndarray (dimensionless), shape of ``wave_rest_nm``
    """
    l = np.asarray(wave_rest_nm, dtype=float) / 1000.0
    lc = np.clip(l, _L_BLUE, _L_RED)
    k = np.where(lc < _L_MID, _k_uv(lc), _k_opt(lc))
    # blue continuation: ln k linear in ln l with the slope of eq. 4 at 0.12 micron
    h = 1e-4
    s_blue = np.log(_k_uv(_L_BLUE + h) / _k_uv(_L_BLUE)) / np.log1p(h / _L_BLUE)
    k = np.where(l < _L_BLUE, _k_uv(_L_BLUE) * (l / _L_BLUE) ** s_blue, k)
    return np.where(l > _L_RED, _k_opt(_L_RED) * (l / _L_RED) ** _NIR_POWER, k)


def attenuation_mag(wave_rest_nm, av):
    """Attenuation A(lambda) = A_V k(lambda) / R_V (mag).

    Parameters
    ----------
    wave_rest_nm : array_like (nm)
        Rest-frame wavelengths, e.g. shape (n_gal, n_wave).
    av : array_like (mag)
        V-band attenuation, broadcast against ``wave_rest_nm`` (e.g. shape (n_gal, 1)).

    Returns
    -------
    ndarray (mag), the broadcast shape
    """
    return np.asarray(av, dtype=float) * calzetti_k(wave_rest_nm) / CALZETTI_RV
