"""Calzetti et al. 2000 (ApJ 533, 682) starburst attenuation of the dusty templates.

The curve is the population's own (:func:`simfield.population.dust.calzetti_k`: eq. 4 with
R_V = 4.05 and its continuations outside 0.12-2.2 micron), so the templates carry exactly the
attenuation the dusty galaxies of a run are drawn with; the attenuated flux is
f_int 10^(-0.4 A_V k(l) / R_V).

Units: wavelengths in nm, A_V in mag.
"""

from __future__ import annotations

import numpy as np

from ..population.dust import CALZETTI_RV, calzetti_k

__all__ = ["CALZETTI_RV", "calzetti_k", "attenuation_ratio"]


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
