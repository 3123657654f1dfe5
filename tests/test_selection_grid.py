"""Selection functions from many injection jobs: the M_UV-uniform injection mode and the
addition of the jobs' (M_UV, z) cells."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.stats import binom_conf_interval
from astropy.table import Table
from numpy.testing import assert_allclose
from scipy import stats

from simfield.errors import CatalogError, ConfigError
from simfield.pipeline import make_bands
from simfield.population.lightcone import make_population
from simfield.random import stream
from simfield.selection.combine import combine_completeness
from tests.conftest import make_scenario


def test_uniform_in_abs_mag_fills_m_uv_and_z_evenly():
    """population=grid draws galaxies uniform in M_UV and z: Kolmogorov-Smirnov against the
    uniform distributions (scipy.stats.kstest) does not reject at 1%."""
    sc = make_scenario("population=grid", "population.uniform_density_arcmin2=2000")
    t = make_population(sc.population, make_bands(sc), (-30.0, 30.0), (-30.0, 30.0),
                        stream(3, "population"))
    g = t[t["kind"] == "galaxy"]
    assert len(g) > 1000
    p = sc.population
    m = np.asarray(g["abs_mag_uv"], float)
    z = np.asarray(g["redshift"], float)
    assert m.min() >= p.uniform_abs_mag_min and m.max() <= p.uniform_abs_mag_max
    span = p.uniform_abs_mag_max - p.uniform_abs_mag_min
    assert stats.kstest(m, stats.uniform(p.uniform_abs_mag_min, span).cdf).pvalue > 0.01
    assert stats.kstest(z, stats.uniform(p.z_min, p.z_max - p.z_min).cdf).pvalue > 0.01


def test_uniform_in_refuses_an_unknown_choice():
    """population.uniform_in other than mag / abs_mag: one line naming the key."""
    with pytest.raises(ConfigError, match="population.uniform_in"):
        make_scenario("population.uniform_in=flux")


def _cells(n, k):
    return Table({"abs_mag_uv_lo": [-21.0, -20.0], "abs_mag_uv_hi": [-20.0, -19.0],
                  "z_lo": [7.0, 7.0], "z_hi": [7.25, 7.25], "n": n, "k": k})


def test_cells_add_across_jobs(tmp_path):
    """k and n of each cell add over the jobs; the fraction and its Jeffreys interval are those
    of the sums (astropy.stats.binom_conf_interval, Brown, Cai & DasGupta 2001)."""
    for i, (n, k) in enumerate((([3, 0], [2, 0]), ([5, 4], [5, 1]))):
        d = tmp_path / f"job{i}" / "selection" / "z7"
        d.mkdir(parents=True)
        _cells(n, k).write(d / "completeness.ecsv")
    (tmp_path / "job_without_selection").mkdir()
    out = combine_completeness([tmp_path / "job0", tmp_path / "job1",
                                tmp_path / "job_without_selection"])
    t = out["z7"]
    assert list(t["n"]) == [8, 4] and list(t["k"]) == [7, 1] and t["n_jobs"][0] == 2
    assert_allclose(t["fraction"], [7 / 8, 1 / 4])
    lo, hi = binom_conf_interval(np.array([7, 1]), np.array([8, 4]), 0.683, "jeffreys")
    assert_allclose(t["fraction_lo"], lo, rtol=1e-8)
    assert_allclose(t["fraction_hi"], hi, rtol=1e-8)


def test_cells_of_different_binnings_are_refused(tmp_path):
    """Jobs binned differently cannot be added: one line naming the file and the sample."""
    for i, z_hi in enumerate((7.25, 7.5)):
        d = tmp_path / f"job{i}" / "selection" / "z7"
        d.mkdir(parents=True)
        t = _cells([1, 1], [0, 1])
        t["z_hi"] = [z_hi, z_hi]
        t.write(d / "completeness.ecsv")
    with pytest.raises(CatalogError, match="z7"):
        combine_completeness([tmp_path / "job0", tmp_path / "job1"])
