"""Optional luminosity-function prior of the fit (default off: a flat prior in z).

``luminosity``: the weight of template t at redshift z for an object of fitted amplitude a
(observed f_nu at rest 1500 A, nJy) is the number of galaxies per unit redshift and magnitude
with that brightness,

    prior(t, z) = phi(M_UV, z) dV/dz,   M_UV = 31.4 - 2.5 log10(a) - DM(z) + 2.5 log10(1 + z)

with phi the population's own rest-UV Schechter function
(:func:`simfield.population.luminosity.uv_luminosity_function`) and dV/dz the comoving volume
per unit redshift and solid angle (Hogg 1999, eq. 28, via astropy). M_UV fainter than the
faint limit is held at the limit (the faint-end power law would otherwise reward a = 0), and
z is floored at 1e-3 (DM diverges at z = 0).

Units: amplitudes in nJy, magnitudes AB.
"""

from __future__ import annotations

import numpy as np

from ..bands import AB_NJY_ZERO
from ..cosmo import comoving_volume_element, distance_modulus
from ..population.luminosity import uv_luminosity_function

__all__ = ["PRIORS", "luminosity_prior", "make_prior"]

#: Names of the priors :func:`make_prior` knows.
PRIORS = ("none", "luminosity")

_Z_FLOOR = 1e-3


def luminosity_prior(z, abs_mag_faint: float = -13.0, cosmo=None):
    """The ``luminosity`` prior on the redshift grid ``z`` (see the module docstring).

    Parameters
    ----------
    z : ndarray, shape (n_z,)
        The template set's redshift grid.
    abs_mag_faint : float (AB mag)
        Faint limit of M_UV.
    cosmo : astropy cosmology, optional

    Returns
    -------
    callable ``prior(amplitude, z)`` for :func:`simfield.photoz.fit.fit_photoz`
    """
    zf = np.maximum(np.asarray(z, dtype=float), _Z_FLOOR)
    m_offset = AB_NJY_ZERO - distance_modulus(zf, cosmo) + 2.5 * np.log10(1.0 + zf)
    dvdz = comoving_volume_element(zf, cosmo)

    def prior(amplitude, z_grid):
        with np.errstate(divide="ignore"):
            m_uv = m_offset - 2.5 * np.log10(np.maximum(amplitude, 1e-300))
        m_uv = np.minimum(m_uv, abs_mag_faint)
        return uv_luminosity_function(m_uv, zf) * dvdz

    return prior


def make_prior(name: str, z, abs_mag_faint: float = -13.0, cosmo=None):
    """The prior called ``name`` (one of :data:`PRIORS`) on grid ``z``; None for ``none``."""
    if name == "none":
        return None
    return luminosity_prior(z, abs_mag_faint, cosmo)
