"""Counts of a truth table per magnitude and area (simfield.population.counts)."""

from __future__ import annotations

import numpy as np
from astropy.table import Table
from numpy.testing import assert_allclose
from scipy import integrate

from simfield.population.counts import (REFERENCE_LOG_COUNTS, REFERENCE_MAGS, population_counts,
                                        reference_counts, split_counts)


def test_counts_per_mag_per_square_degree():
    """60 galaxies in one 0.5-mag bin over 1 arcmin^2 are 60 * 3600 * 2 per mag per deg^2
    (1 deg^2 = 3600 arcmin^2); stars are not counted; the reference is the tabulated value
    at an integer magnitude (Windhorst et al. 2011 [from memory])."""
    t = Table({"kind": ["galaxy"] * 60 + ["star"] * 5, "mag_b17": np.full(65, 24.2)})
    mid, n, err = population_counts(t, "b17", 3600.0, np.array([23.5, 24.0, 24.5]))
    assert_allclose(mid, [23.75, 24.25])
    assert_allclose(n, [0.0, 60 * 3600 * 2])
    assert_allclose(err[1], np.sqrt(60) * 3600 * 2)
    assert_allclose(reference_counts(24.0), 10 ** 4.95)


def test_split_counts_add_up_to_the_galaxy_counts():
    """The split by redshift and family covers every galaxy once (stars left out)."""
    rng = np.random.default_rng(1)
    kind = np.array(["galaxy"] * 50 + ["dusty"] * 5 + ["quiescent"] * 5 + ["star"] * 4)
    t = Table({"kind": kind, "redshift": rng.uniform(0.2, 9.0, kind.size),
               "mag_b17": rng.uniform(20.0, 28.0, kind.size)})
    edges = np.arange(20.0, 28.01, 0.5)
    parts = split_counts(t, "b17", 3600.0, edges)
    assert_allclose(sum(parts.values()), population_counts(t, "b17", 3600.0, edges)[1])


def test_reference_normalisation_against_yan_1998():
    """The reference integrated to H_AB = 24.75 + 1.39 is within 30 % of the 4e5 deg^-2 to
    H <= 24.75 (Vega) of Yan et al. 1998, ApJ 503, L19 (abstract); Vega-to-AB offset 1.39 at
    1.6 um [from memory]; galaxies brighter than AB 20 from the reference's first slope."""
    m = np.linspace(20.0, 24.75 + 1.39, 2001)
    slope = (REFERENCE_LOG_COUNTS[1] - REFERENCE_LOG_COUNTS[0]) / (REFERENCE_MAGS[1]
                                                                     - REFERENCE_MAGS[0])
    n = integrate.trapezoid(reference_counts(m), m) + reference_counts(20.0) / (slope
                                                                                * np.log(10))
    assert abs(n / 4e5 - 1.0) < 0.3, n
