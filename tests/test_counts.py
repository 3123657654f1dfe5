"""Counts of a truth table per magnitude and area (simfield.population.counts)."""

from __future__ import annotations

import numpy as np
from astropy.table import Table
from numpy.testing import assert_allclose

from simfield.population.counts import population_counts, reference_counts


def test_counts_per_mag_per_square_degree():
    """60 galaxies in one 0.5-mag bin over 1 arcmin^2 are 60 * 3600 * 2 per mag per deg^2
    (1 deg^2 = 3600 arcmin^2); stars are not counted; the reference is the tabulated value
    at an integer magnitude (Windhorst et al. 2011 [from memory])."""
    t = Table({"kind": ["galaxy"] * 60 + ["star"] * 5, "mag_b17": np.full(65, 24.2)})
    mid, n, err = population_counts(t, "b17", 3600.0, np.array([23.5, 24.0, 24.5]))
    assert_allclose(mid, [23.75, 24.25])
    assert_allclose(n, [0.0, 60 * 3600 * 2])
    assert_allclose(err[1], np.sqrt(60) * 3600 * 2)
    assert_allclose(reference_counts(24.0), 10 ** 4.65)
