"""Galaxy half-light radii from published size-luminosity-redshift relations, with scatter.

Star-forming galaxies, rest-UV sizes (Shibuya, Ouchi & Harikane 2015, ApJS 219, 15: r_e ~
L_UV^0.27 at every redshift from 0 to 8, r_e ~ (1 + z)^-1.0...-1.3 at fixed L_UV, log-normal
scatter sigma_ln r_e ~ 0.5-0.7; the numbers below are [from memory])::

    r_e = 6.9 kpc (L_UV / L_0)^0.27 (1 + z)^-1.2,    L_0 at M_UV = -21,    sigma_ln = 0.6

(r_e ~ 1.0 kpc at z = 4 and M_UV = -21, ~0.3 kpc at z = 6 and M_UV = -18).

Quiescent (early-type) galaxies, rest-optical (500 nm) sizes (van der Wel et al. 2014, ApJ
788, 28, their power-law fits [from memory]: log10 A = 0.60 at z = 0.25, slope 0.75 in stellar
mass, A ~ (1 + z)^-1.48, intrinsic scatter ~0.10-0.16 dex)::

    log10 (r_e / kpc) = 0.60 + 0.75 log10(M* / 5e10 Msun) - 1.48 log10((1 + z) / 1.25),
    sigma_log10 = 0.13

with the stellar mass from the rest-550 nm luminosity and a passively fading mass-to-light
ratio log10(M/L_V) = 0.48 - 0.25 z, kept within [-0.3, 0.48] (M/L_V ~ 3 for an old population
today, ~1 at z ~ 2-3: assumption, common practice for passive evolution); M_V,sun = 4.81 AB.

Sizes are the half-light radius of the whole galaxy (bulge and disk together, see
:mod:`.components`) at the rest wavelength of the relation: 150 nm for star-forming, 550 nm for
quiescent galaxies. Units: kpc (proper).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "SF_R0_KPC", "SF_LUM_SLOPE", "SF_Z_SLOPE", "SF_SIGMA_LN", "SF_M_REF",
    "Q_LOG_A", "Q_MASS_SLOPE", "Q_Z_SLOPE", "Q_SIGMA_LOG10", "Q_MASS_REF",
    "REFERENCE_WAVELENGTH_NM", "starforming_r_half_kpc", "quiescent_stellar_mass",
    "quiescent_r_half_kpc", "median_r_half_kpc", "sigma_ln", "draw_r_half_kpc",
]

# Shibuya et al. 2015 [from memory]
SF_R0_KPC = 6.9  #: r_e (kpc) at L_0 and z = 0
SF_LUM_SLOPE = 0.27  #: d ln r_e / d ln L_UV
SF_Z_SLOPE = -1.2  #: d ln r_e / d ln(1 + z)
SF_SIGMA_LN = 0.6  #: log-normal scatter (natural log)
SF_M_REF = -21.0  #: M_UV (AB) of L_0
# van der Wel et al. 2014, early types [from memory]
Q_LOG_A = 0.60  #: log10 r_e (kpc) at M* = Q_MASS_REF and z = 0.25
Q_MASS_SLOPE = 0.75  #: d log r_e / d log M*
Q_Z_SLOPE = -1.48  #: d log r_e / d log(1 + z)
Q_SIGMA_LOG10 = 0.13  #: intrinsic scatter (dex)
Q_MASS_REF = 5e10  #: Msun
_MV_SUN_AB = 4.81
#: Rest wavelength (nm) at which each relation gives the half-light radius.
REFERENCE_WAVELENGTH_NM = {"starforming": 150.0, "quiescent": 550.0}


def starforming_r_half_kpc(z, abs_mag_uv):
    """Median rest-UV half-light radius (kpc) of star-forming galaxies (Shibuya et al. 2015).

    Parameters
    ----------
    z : array_like
    abs_mag_uv : array_like (AB mag), rest 150 nm
    """
    z = np.asarray(z, dtype=float)
    m = np.asarray(abs_mag_uv, dtype=float)
    return SF_R0_KPC * 10.0 ** (-0.4 * SF_LUM_SLOPE * (m - SF_M_REF)) * (1.0 + z) ** SF_Z_SLOPE


def quiescent_stellar_mass(z, abs_mag_opt):
    """Stellar mass (Msun) of a quiescent galaxy from its rest-550 nm absolute magnitude (AB)
    and the passively fading M/L_V of the module docstring."""
    z = np.asarray(z, dtype=float)
    log_ml = np.clip(0.48 - 0.25 * z, -0.3, 0.48)
    return 10.0 ** (-0.4 * (np.asarray(abs_mag_opt, dtype=float) - _MV_SUN_AB) + log_ml)


def quiescent_r_half_kpc(z, abs_mag_opt):
    """Median rest-optical half-light radius (kpc) of quiescent galaxies (van der Wel et al.
    2014), from z and the rest-550 nm absolute magnitude (AB)."""
    z = np.asarray(z, dtype=float)
    log_r = (Q_LOG_A + Q_MASS_SLOPE * np.log10(quiescent_stellar_mass(z, abs_mag_opt)
                                               / Q_MASS_REF)
             + Q_Z_SLOPE * np.log10((1.0 + z) / 1.25))
    return 10.0 ** log_r


def median_r_half_kpc(z, abs_mag_uv, evolved, abs_mag_opt=None):
    """Median half-light radius (kpc): :func:`quiescent_r_half_kpc` for ``evolved``
    galaxies (rest-550 nm magnitude ``abs_mag_opt``, by default M_UV - 4), else
    :func:`starforming_r_half_kpc`."""
    m_uv = np.asarray(abs_mag_uv, dtype=float)
    m_opt = m_uv - 4.0 if abs_mag_opt is None else np.asarray(abs_mag_opt, dtype=float)
    return np.where(np.asarray(evolved, dtype=bool), quiescent_r_half_kpc(z, m_opt),
                    starforming_r_half_kpc(z, m_uv))


def sigma_ln(evolved):
    """Log-normal scatter (natural log) of the size at fixed luminosity and redshift."""
    return np.where(np.asarray(evolved, dtype=bool), Q_SIGMA_LOG10 * np.log(10.0),
                    SF_SIGMA_LN)


def draw_r_half_kpc(z, abs_mag_uv, evolved, deviate, abs_mag_opt=None):
    """Half-light radii (kpc): the median relation times exp(sigma_ln * ``deviate``), with
    ``deviate`` standard normal (clip it for bounded sizes)."""
    return median_r_half_kpc(z, abs_mag_uv, evolved, abs_mag_opt) \
        * np.exp(sigma_ln(evolved) * np.asarray(deviate, dtype=float))
