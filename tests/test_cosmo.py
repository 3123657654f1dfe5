"""Distances of simfield.cosmo.

Sources:
- Hogg 1999 (arXiv:astro-ph/9905116) eq. 19: in a flat universe the angular diameter distance
  between z1 < z2 is D_A12 = (D_M(z2) - D_M(z1)) / (1 + z2), with D_M = D_C (eq. 16) the
  comoving distance, D_C = (c / H0) int_0^z dz' / E(z'), E = sqrt(Om (1+z)^3 + 1 - Om)
  (eq. 14 without radiation; the default cosmology has no massive neutrinos and its radiation
  term is ~1e-4 of the total, so the check allows 1e-3).
- scipy.integrate.quad for the integral (reference library, independent of astropy).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.integrate import quad

from simfield.cosmo import angular_diameter_distance_z1z2, default_cosmology

C_KMS = 299792.458  # speed of light (km/s), exact by definition of the metre


def _comoving_distance_mpc(z, h0=70.0, om=0.3):
    return C_KMS / h0 * quad(lambda x: 1.0 / np.sqrt(om * (1 + x) ** 3 + 1 - om), 0.0, z)[0]


@pytest.mark.parametrize("z1,z2", [(0.35, 9.0), (0.5, 2.0), (0.1, 0.2)])
def test_dls_equals_flat_relation_hogg_eq19(z1, z2):
    cosmo = default_cosmology()
    assert cosmo.Ok0 == 0.0  # eq. 19 in this form holds for a flat universe only
    want = (_comoving_distance_mpc(z2) - _comoving_distance_mpc(z1)) / (1 + z2)
    got = angular_diameter_distance_z1z2(z1, z2)
    assert got == pytest.approx(want, rel=1e-3)


def test_dls_raises_no_warning_and_takes_arrays():
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning (the astropy deprecation one) fails
        got = angular_diameter_distance_z1z2(np.array([0.35, 0.5]), np.array([9.0, 2.0]))
    assert got.shape == (2,)
    assert got[1] == pytest.approx(angular_diameter_distance_z1z2(0.5, 2.0), rel=1e-12)
