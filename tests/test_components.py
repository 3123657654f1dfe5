"""Bulge + disk galaxies (simfield.population.components) against GalSim's drawn profiles."""

from __future__ import annotations

import dataclasses

import galsim
import numpy as np
import pytest
from numpy.testing import assert_allclose

from simfield.bands import make_band
from simfield.config import PopulationConfig
from simfield.population import components, make_population
from simfield.population.morphology import make_components, make_profile
from simfield.random import stream
from simfield.scene import Stamp, accumulate, draw_source_stamp

BANDS = [make_band("b10", 1000, 220, 0.30), make_band("b17", 1700, 380, 0.40),
         make_band("b36", 3600, 800, 0.45)]


@pytest.fixture(scope="module")
def composites():
    pop = dataclasses.replace(PopulationConfig(), mag_limit=25.0, placement="uniform")
    t = make_population(pop, BANDS, (-40, 40), (-40, 40), stream(3, "population"))
    return t[t["n_components"] == 2]


def _round(row):
    """The row as a dict, round and without knots (radii and fluxes do not depend on shape)."""
    d = dict(zip(row.colnames, row)) if hasattr(row, "colnames") else dict(row)
    d.update(axis_ratio=1.0, knot_fraction=0.0, n_knots=0)
    return d


def _grid(row):
    """(pixel scale, even size): 1/25 of the smaller radius, 6 disk radii a side."""
    scale = min(float(row["r_half_bulge"]), float(row["r_half_disk"])) / 25
    return scale, 2 * int(np.ceil(6 * float(row["r_half_disk"]) / scale))


def _draw(prof, scale, n):
    """GalSim image of point samples at pixel centres; with an even size the centre falls on
    a pixel corner, and at 1/25 of the bulge radius the samples hold a round n = 4 profile's
    flux to ~0.1 % (a sample on the centre itself would overstate it by a few per cent)."""
    return prof.drawImage(nx=n, ny=n, scale=scale, method="no_pixel").array


def _measured_hlr(img, scale):
    """Half-light radius (arcsec) of a round profile's centred image: the radius where the
    cumulative flux of pixels sorted by distance from the centre reaches half."""
    n = img.shape[0]
    c = (n - 1) / 2
    yy, xx = np.divmod(np.arange(n * n), n)
    r = np.hypot(xx - c, yy - c) * scale
    o = np.argsort(r)
    cum = np.cumsum(img.ravel()[o], dtype=np.float64)  # float32 sums drift over many pixels
    return float(np.interp(0.5 * cum[-1], cum, r[o]))


def test_enclosed_fraction_matches_galsim():
    """The truncated Sersic enclosed-flux curve (n = 1 and 4) puts half the light at r_half
    and agrees with GalSim's truncated profile drawn on pixels."""
    for n in (components.DISK_N, components.BULGE_N):
        assert_allclose(components.enclosed_fraction(1.0, n), 0.5, rtol=1e-10)
        img = _draw(galsim.Sersic(n, half_light_radius=1.0, trunc=5.0), 0.025, 480)
        assert_allclose(img.sum(), 1.0, rtol=2e-3)
        assert_allclose(_measured_hlr(img, 0.025), 1.0, rtol=0.01)


def test_bands_total_flux_is_sum_of_components(composites):
    """In every band a two-component galaxy's flux F = 10^(-0.4 (m - zp)) is the sum of the
    GalSim-drawn bulge (flux F B/T) and disk (F (1 - B/T)), and the scene's stamp (disk and
    bulge weighed by B/T, :func:`simfield.scene.accumulate`) holds the same flux."""
    row = _round(composites[int(np.argmax(composites["bulge_fraction"]))])
    disk, bulge = make_components(row, 1)
    scale, n = _grid(row)
    unit_b, unit_d = (_draw(p, scale, n).sum(dtype=np.float64) for p in (bulge, disk))
    assert_allclose([unit_b, unit_d], 1.0, rtol=4e-3)  # the images hold the light
    zp = 25.0
    bts = []
    for b in BANDS:
        f = 10 ** (-0.4 * (float(row[f"mag_{b.name}"]) - zp))
        bt = float(row[f"bt_{b.name}"])
        bts.append(bt)
        # the components drawn with fluxes F B/T and F (1 - B/T) add up to F
        assert_allclose(f * bt * unit_b + f * (1 - bt) * unit_d, f, rtol=4e-3)
        sc = 0.05  # the scene's stamps (its sampling rules) on pixels of 0.05"
        d, s = (draw_source_stamp(p, 200.0, 200.0, sc, float(row[c]) / sc, 0, 190)
                for p, c in ((disk, "r_half_disk"), (bulge, "r_half_bulge")))
        st = Stamp(d.image, d.iy0, d.ix0, 0, bulge=s.image)
        img = accumulate([st], np.array([f]), (400, 400), bulge_fraction=np.array([bt]))
        assert_allclose(img.sum(), f, rtol=3e-3)
    # the composite of one band drawn by GalSim: the same flux
    k = int(np.argmax(bts))
    total = _draw(make_profile(row, 1, BANDS[k].name), scale, n).sum(dtype=np.float64)
    assert_allclose(total, bts[k] * unit_b + (1 - bts[k]) * unit_d, rtol=1e-4)


def test_band_half_light_radius_matches_galsim_image(composites):
    """r_half_<band> (truth) equals the half-light radius measured on the GalSim image of the
    composite in that band (round, no knots), to 0.5 %; bulges are redder, so B/T rises and
    the radius shrinks from b10 to b36 for star-forming galaxies (common practice)."""
    sf = composites[np.asarray(composites["template"]).astype(str) == "starforming"]
    row = _round(sf[int(np.argmax(sf["bt_b36"] - sf["bt_b10"]))])
    assert row["bt_b36"] > row["bt_b10"] + 0.05
    scale, n = _grid(row)
    for b in ("b10", "b36"):
        meas = _measured_hlr(_draw(make_profile(row, 1, b), scale, n), scale)
        assert_allclose(meas, row[f"r_half_{b}"], rtol=0.005)
    bt10, bt36 = (np.asarray(sf[f"bt_{b}"], float) for b in ("b10", "b36"))
    r10, r36 = (np.asarray(sf[f"r_half_{b}"], float) for b in ("b10", "b36"))
    assert np.mean(bt36 > bt10) > 0.8 and np.mean(r36 < r10) > 0.8


def test_composite_radius_between_components():
    """The sum's half-light radius lies between the components' and tends to each at B/T =
    0 and 1 (a property of any two-profile sum)."""
    r = components.composite_half_light_radius(np.array([1e-6, 0.5, 1 - 1e-6]), 0.3, 1.0)
    assert_allclose(r[[0, 2]], [1.0, 0.3], rtol=1e-3)
    assert 0.3 < r[1] < 1.0
