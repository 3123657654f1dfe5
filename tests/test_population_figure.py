"""The population's validation figure (simfield.population.figure): written on request, with
labelled axes, the published reference counts and the run's own counts and colours."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from simfield.bands import make_band
from simfield.config import PopulationConfig
from simfield.population.counts import reference_counts
from simfield.population.lightcone import make_population

_BANDS = [make_band("b10", 1000, 220, 0.40), make_band("b16", 1600, 360, 0.40),
          make_band("b36", 3600, 800, 0.40)]
_SIDE = 100.0


@pytest.fixture(scope="module")
def table():
    pop = dataclasses.replace(PopulationConfig(), selection_band="b16", mag_limit=27.0,
                              star_density_arcmin2=10.0, placement="uniform")
    h = _SIDE / 2
    return make_population(pop, _BANDS, (-h, h), (-h, h), np.random.default_rng(3))


def test_key_is_off_by_default():
    """population.figure is false in the schema and in the shipped configuration."""
    import yaml

    from simfield.config import CONF_DIR

    assert PopulationConfig().figure is False
    conf = yaml.safe_load((Path(CONF_DIR) / "population" / "evolving_lf.yaml").read_text())
    assert conf["figure"] is False


def test_figure_axes_counts_and_colours(table, tmp_path):
    """Every axis is labelled; the reference curve is the published table (Driver et al.
    2016, Table 3, read; simfield.population.counts); the points are the galaxies per half
    magnitude counted here from the table; the colour histograms hold every galaxy brighter
    than the colour limit once per colour; the PNG reads back at the figure's size."""
    import matplotlib.image as mpimg
    from simfield.population.figure import COLOUR_MAG_LIMIT, population_figure, save_figure

    fig = population_figure(table, _BANDS, _SIDE ** 2, seed=3)
    for ax in fig.axes:
        assert ax.get_xlabel() and ax.get_ylabel()
    counts_ax, ratio_ax, colour_ax = fig.axes
    assert counts_ax.get_yscale() == "log"
    ref = counts_ax.lines[-1]
    np.testing.assert_allclose(ref.get_ydata(), reference_counts(ref.get_xdata()))
    # the points: galaxies per 0.5 mag bin, per mag per deg^2, counted independently here
    kind = np.asarray(table["kind"]).astype(str)
    gal = (kind != "star") & (kind != "dwarf")  # galaxies of every family
    m = np.asarray(table["mag_b16"], float)[gal]
    x, y = counts_ax.lines[0].get_xdata(), counts_ax.lines[0].get_ydata()
    for xi, yi in zip(x, y):
        n = np.sum((m >= xi - 0.25) & (m < xi + 0.25))
        assert yi == pytest.approx(n * 3600.0 ** 2 / _SIDE ** 2 / 0.5)
    n_colour = np.sum(m < COLOUR_MAG_LIMIT)
    heights = [p.get_path().vertices[:, 1].max() for p in colour_ax.patches]
    assert len(colour_ax.patches) == 4 and min(heights) > 0
    labels = [p.get_label() for p in colour_ax.patches]
    for colour in ("b10 - b16", "b16 - b36"):
        total = sum(int(lab.rsplit("(", 1)[1].rstrip(")")) for lab in labels
                    if lab.startswith(colour))
        assert total == n_colour
    out = save_figure(fig, tmp_path / "population.png")
    img = mpimg.imread(out)
    assert img.shape[:2] == (round(5.5 * 110), round(9.0 * 110))
