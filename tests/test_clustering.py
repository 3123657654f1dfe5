"""Clustered galaxy positions (simfield.population.clustering) measured with treecorr."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from astropy.table import Table
from numpy.testing import assert_allclose
from scipy.optimize import least_squares

from simfield.bands import make_band
from simfield.config import PopulationConfig
from simfield.errors import ConfigError
from simfield.population import clustering, make_population
from simfield.random import stream

treecorr = pytest.importorskip("treecorr")

BANDS = [make_band("b10", 1000, 220, 0.30), make_band("b36", 3600, 800, 0.45)]


def _rr_square(edges, side, n):
    """Expected pairs of n uniform points in a square of ``side`` with separations in the
    bins ``edges`` (same units): the distance density of two random points in a unit square,
    2 s (pi - 4 s + s^2) for s <= 1 (a textbook result of geometric probability)."""
    s = np.linspace(0.0, edges[-1] / side, 40001)
    f = 2 * s * (np.pi - 4 * s + s * s)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(s))])
    return 0.5 * n * (n - 1) * np.diff(np.interp(edges / side, s, cdf))


def test_w_theta_recovers_input_power_law():
    """w(theta) of galaxies placed by :func:`place_clustered` (one redshift slice, m = 24:
    A = 0.1 at 1 arcsec, b = 1), measured with treecorr (pair counts DD over the exact
    random-pair counts of the square) over 1-60 arcsec in three independent fields, fits
    A theta^(1 - gamma) - C (C: the integral constraint of a finite field, Roche et al. 1993,
    free) with A = 0.1 and gamma = 1.8 within 3 sigma. Errors: the scatter of the fields, at
    least twice the Poisson error of DD (three fields estimate a scatter poorly)."""
    side, n, n_fields = 300.0, 15000, 3
    edges = np.logspace(0.0, np.log10(60.0), 9)
    rng = np.random.default_rng(11)
    rr = _rr_square(edges, side, n)
    ws, dds = [], []
    for _ in range(n_fields):
        t = Table({"kind": np.full(n, "galaxy"), "redshift": np.full(n, 2.5),
                   "mag_b36": np.full(n, 24.0), "x_arcsec": np.zeros(n),
                   "y_arcsec": np.zeros(n)})
        clustering.place_clustered(t, "b36", (0.0, side), (0.0, side), rng)
        assert t["x_arcsec"].min() >= 0 and t["x_arcsec"].max() <= side
        dd = treecorr.NNCorrelation(min_sep=1.0, max_sep=60.0, nbins=8, bin_slop=0)
        dd.process(treecorr.Catalog(x=np.asarray(t["x_arcsec"]), y=np.asarray(t["y_arcsec"])))
        ws.append(dd.npairs / rr - 1.0)
        dds.append(dd.npairs)
    theta = np.exp(dd.meanlogr)
    w = np.mean(ws, axis=0)
    err = np.maximum(np.std(ws, axis=0, ddof=1),
                     2 * np.sqrt(np.mean(dds, axis=0)) / rr) / np.sqrt(n_fields)
    fit = least_squares(lambda p: (p[0] * theta ** (1 - p[1]) - p[2] - w) / err,
                        [0.05, 1.6, 0.0], bounds=([0.0, 1.2, -0.05], [1.0, 2.6, 0.05]))
    sig = np.sqrt(np.diag(np.linalg.inv(fit.jac.T @ fit.jac)))
    assert clustering.amplitude_1arcsec(24.0) == pytest.approx(clustering.FIELD_AMPLITUDE)
    assert sig[0] < 0.3 * 0.1 and sig[1] < 0.35  # precise enough to tell
    assert abs(fit.x[0] - 0.1) < 3 * sig[0]
    assert abs(fit.x[1] - clustering.GAMMA) < 3 * sig[1]


def test_amplitudes_follow_deep_field_slope():
    """w(1") falls as 10^(-0.27 m) to m = 26 and 10^(-0.1 m) beyond (Villumsen, Freudling &
    da Costa 1997 [from memory])."""
    a = clustering.amplitude_1arcsec(np.array([24.0, 25.0, 26.0, 28.0]))
    assert_allclose(a[0], 0.1)
    assert_allclose(np.log10(a[0] / a[1]), 0.27)
    assert_allclose(np.log10(a[2] / a[3]), 0.2)


def test_clustering_keeps_counts():
    """Clustered and uniform placement of the same draw: identical sources and magnitudes (so
    identical counts, no Poisson difference at all), galaxies moved, all inside the field."""
    kw = dict(mag_limit=27.0, dusty_density_arcmin2=0.0, quiescent_density_arcmin2=0.0)
    runs = {p: make_population(dataclasses.replace(PopulationConfig(), placement=p, **kw),
                               BANDS, (-60, 60), (-60, 60), stream(4, "population"))
            for p in ("clustered", "uniform")}
    c, u = runs["clustered"], runs["uniform"]
    assert len(c) == len(u) > 500
    np.testing.assert_array_equal(c["mag_b36"], u["mag_b36"])
    gal = np.asarray(c["kind"]) == "galaxy"
    assert np.all(np.abs(c["x_arcsec"]) <= 60) and np.all(np.abs(c["y_arcsec"]) <= 60)
    assert np.mean(np.asarray(c["x_arcsec"])[gal] != np.asarray(u["x_arcsec"])[gal]) > 0.99
    np.testing.assert_array_equal(np.asarray(c["x_arcsec"])[~gal], np.asarray(u["x_arcsec"])[~gal])


def test_bad_placement_refused_before_work():
    """An unknown placement is refused in one line naming the key and the allowed values."""
    from simfield import cli

    with pytest.raises(ConfigError) as info:
        cli.preflight(["survey=quick", "population.placement=lumpy"])
    line = cli.refusal_line(info.value)
    assert line.startswith("population.placement: ") and "clustered or uniform" in line
