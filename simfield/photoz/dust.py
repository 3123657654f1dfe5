"""Calzetti et al. 2000 (ApJ 533, 682) starburst attenuation.

Eq. 4 of the paper, with l the rest wavelength in micron and R_V = 4.05 (eq. 5):

    k(l) = 2.659 (-2.156 + 1.509/l - 0.198/l^2 + 0.011/l^3) + R_V     0.12 <= l < 0.63
    k(l) = 2.659 (-1.857 + 1.040/l) + R_V                            0.63 <= l <= 2.20

and the attenuated flux is f_int 10^(-0.4 A_V k(l) / R_V). Outside the fitted range the two
branches are continued (common practice in template fitting): the UV polynomial below 0.12
micron (only down to the Lyman limit matters: the templates are dark below it), the
near-infrared branch above 2.2 micron, clipped at k = 0 (reached at 3.11 micron).

Units: wavelengths in nm, A_V in mag.
"""

from __future__ import annotations

import numpy as np

__all__ = ["CALZETTI_RV", "calzetti_k", "attenuation_ratio"]

#: Total-to-selective attenuation of the starburst curve (Calzetti et al. 2000, eq. 5).
CALZETTI_RV = 4.05


def calzetti_k(wave_nm):
    """Calzetti et al. 2000 k(lambda) = A(lambda) / E(B-V) (dimensionless).

    Parameters
    ----------
    wave_nm : array_like (nm)
        Rest wavelengths.
    """
    lam = np.asarray(wave_nm, dtype=float) / 1000.0  # micron
    inv = 1.0 / lam
    uv = 2.659 * (-2.156 + 1.509 * inv - 0.198 * inv**2 + 0.011 * inv**3) + CALZETTI_RV
    nir = 2.659 * (-1.857 + 1.040 * inv) + CALZETTI_RV
    return np.maximum(np.where(lam < 0.63, uv, nir), 0.0)


def attenuation_ratio(wave_nm, a_v, ref_nm: float = 150.0):
    """Attenuated over intrinsic f_nu, relative to its value at ``ref_nm`` (dimensionless).

    10^(-0.4 A_V (k(lambda) - k(ref)) / R_V): a spectrum multiplied by this keeps its flux at
    ``ref_nm`` and gets the colours of A_V magnitudes of Calzetti attenuation.

    Parameters
    ----------
    wave_nm : array_like (nm)
        Rest wavelengths; broadcast with ``a_v``.
    a_v : array_like (mag)
        V-band attenuation.
    ref_nm : float (nm)
        Wavelength where the ratio is 1.
    """
    dk = calzetti_k(wave_nm) - calzetti_k(ref_nm)
    return 10.0 ** (-0.4 * np.asarray(a_v, dtype=float) * dk / CALZETTI_RV)
