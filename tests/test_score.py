"""Tests of simfield.score: matching, intervals, fits, volumes, catalogue checks, a full run.

Comparison to other codes: astropy.coordinates.search_around_sky (matching), astropy.stats.
binom_conf_interval and scipy.stats.beta (intervals), scipy.stats.poisson (counts), astropy.
cosmology comoving_volume (volumes), scipy.integrate.quad (Schechter integrals).
"""

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord, search_around_sky
from astropy.io import fits
from astropy.stats import binom_conf_interval
from astropy.table import Table
from numpy.testing import assert_allclose, assert_array_equal
from scipy import integrate, stats

from simfield.config import ScoreConfig
from simfield.cosmo import default_cosmology
from simfield.errors import CatalogError
from simfield.grid import Grid
from simfield.score import metrics, volume
from simfield.score.match import match_sky
from simfield.score.run import load_catalog, score_main_args, score_run


# ------------------------------------------------------------------------------ matching
def _greedy_reference(it, idd, sep):
    """Sequential greedy walk over astropy's candidate pairs sorted by separation."""
    taken_t, taken_d, pairs = set(), set(), set()
    for k in np.lexsort((idd, it, sep)):
        if it[k] not in taken_t and idd[k] not in taken_d:
            taken_t.add(it[k])
            taken_d.add(idd[k])
            pairs.add((int(it[k]), int(idd[k])))
    return pairs


def test_match_equals_greedy_walk_over_astropy_candidates():
    """Pairs equal a sequential greedy walk over astropy search_around_sky candidates, and the
    separations equal astropy's great-circle separations."""
    rng = np.random.default_rng(3)
    n = 2000
    ra_t = 150 + rng.uniform(-0.01, 0.01, n)
    de_t = 2 + rng.uniform(-0.01, 0.01, n)
    ra_d = np.concatenate([ra_t[:1500] + rng.normal(0, 0.1 / 3600, 1500),
                           150 + rng.uniform(-0.01, 0.01, 700)])
    de_d = np.concatenate([de_t[:1500] + rng.normal(0, 0.1 / 3600, 1500),
                           2 + rng.uniform(-0.01, 0.01, 700)])
    r = 0.6
    m = match_sky(ra_t, de_t, ra_d, de_d, r)
    ct, cd = SkyCoord(ra_t * u.deg, de_t * u.deg), SkyCoord(ra_d * u.deg, de_d * u.deg)
    it, idd, sep, _ = search_around_sky(ct, cd, r * u.arcsec)
    ref = _greedy_reference(it, idd, sep.arcsec)
    assert set(zip(m.truth_index.tolist(), m.det_index.tolist())) == ref
    assert len(ref) > 1400
    # tangent-plane distances vs great circle: < 1e-6 arcsec at these separations
    assert_allclose(m.separation, ct[m.truth_index].separation(cd[m.det_index]).arcsec,
                    rtol=0, atol=1e-6)


def test_match_is_deterministic_under_permutation():
    """The same positions in another row order give the same pairs."""
    rng = np.random.default_rng(4)
    ra = 10 + rng.uniform(0, 0.005, 500)
    de = -5 + rng.uniform(0, 0.005, 500)
    rd = ra + rng.normal(0, 0.2 / 3600, 500)
    dd = de + rng.normal(0, 0.2 / 3600, 500)
    a = match_sky(ra, de, rd, dd, 0.5, 10.0, -5.0)
    p = rng.permutation(500)
    b = match_sky(ra, de, rd[p], dd[p], 0.5, 10.0, -5.0)
    assert_array_equal(a.truth_index, b.truth_index)
    assert_array_equal(p[b.det_index], a.det_index)
