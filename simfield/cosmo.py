"""Cosmology and distance helpers (astropy.cosmology underneath).

The default is a flat LambdaCDM model with H0 = 70 km/s/Mpc, Omega_m = 0.3, the cosmology in
which the luminosity-function parameters of :mod:`simfield.population.luminosity` were
published (Bouwens et al. 2015, ApJ 803, 34). Distances in Mpc, volumes in Mpc^3, solid angles
in arcsec^2 unless stated otherwise.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from astropy.cosmology import FlatLambdaCDM

__all__ = [
    "default_cosmology",
    "distance_modulus",
    "comoving_volume_element",
    "angular_diameter_distance",
    "angular_diameter_distance_z1z2",
    "ARCSEC2_PER_SR",
]

ARCSEC2_PER_SR = (180.0 / np.pi * 3600.0) ** 2


@lru_cache(maxsize=1)
def default_cosmology() -> FlatLambdaCDM:
    """Flat LambdaCDM, H0 = 70 km/s/Mpc, Omega_m = 0.3, T_CMB = 2.725 K."""
    return FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725)


def distance_modulus(z, cosmo=None):
    """Distance modulus DM(z) = 5 log10(D_L / 10 pc) (mag)."""
    cosmo = cosmo or default_cosmology()
    return cosmo.distmod(np.asarray(z, dtype=float)).value


def comoving_volume_element(z, cosmo=None):
    """dV_c / dz / dOmega in Mpc^3 per unit redshift per arcsec^2 (Hogg 1999 eq. 28)."""
    cosmo = cosmo or default_cosmology()
    return cosmo.differential_comoving_volume(np.asarray(z, dtype=float)).value / ARCSEC2_PER_SR


def angular_diameter_distance(z, cosmo=None):
    """D_A(z) in Mpc."""
    cosmo = cosmo or default_cosmology()
    return cosmo.angular_diameter_distance(np.asarray(z, dtype=float)).value


def angular_diameter_distance_z1z2(z1, z2, cosmo=None):
    """D_A between z1 < z2 in Mpc (the lens-source distance D_ls)."""
    cosmo = cosmo or default_cosmology()
    z1, z2 = np.asarray(z1, dtype=float), np.asarray(z2, dtype=float)
    try:  # the two-redshift form of astropy 8 (which deprecates ``*_z1z2`` and warns)
        return cosmo.angular_diameter_distance(z1, z2).value
    except TypeError:  # older astropy takes one redshift only
        return cosmo.angular_diameter_distance_z1z2(z1, z2).value
