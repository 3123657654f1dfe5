"""Validation figure of a run's population: near-infrared counts and colours.

A run writes ``population.png`` when ``population.figure`` is true (default false). Panels:

1. differential galaxy counts dN/dm (mag^-1 deg^-2) in the band whose pivot is nearest 1.6 um,
   with Poisson errors, against the published deep-field counts of :mod:`.counts` (Driver et
   al. 2016, Table 3, read in a stored copy; none drawn outside AB 20.25-28.25);
2. their ratio, with the +-30 % band of the issue's check;
3. the distributions of two colours of the galaxies brighter than AB 26 in that band: the
   bluest band minus it (the rest-UV/optical slope and the 380 nm break of z ~ 1-3 galaxies)
   and it minus the reddest band (the rest-optical/near-infrared slope), for the star-forming
   and the evolved templates separately.

Galaxies are those of kinds galaxy, dusty and quiescent, with their intrinsic magnitudes (the
truth table's ``mag_<band>``), counted over the area they were drawn on. Units: AB mag, arcsec^2.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .counts import _GALAXY_KINDS, population_counts, reference_counts

__all__ = ["COLOUR_MAG_LIMIT", "figure_bands", "population_figure", "save_figure",
           "write_population_figure"]

#: Galaxies brighter than this (AB, in the band nearest 1.6 um) enter the colour panel.
COLOUR_MAG_LIMIT = 26.0
_EDGES = np.arange(20.0, 29.01, 0.5)


def figure_bands(bands) -> tuple[str, str, str]:
    """(bluest, nearest 1.6 um, reddest) band names of ``bands`` (objects with ``name`` and
    ``pivot_nm``)."""
    by = sorted(bands, key=lambda b: b.pivot_nm)
    mid = min(bands, key=lambda b: abs(b.pivot_nm - 1600.0))
    return by[0].name, mid.name, by[-1].name


def population_figure(table, bands, area_arcsec2: float, seed=None):
    """The matplotlib Figure of the module docstring for the truth table ``table`` drawn over
    ``area_arcsec2`` (arcsec^2)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .._plot import run_title

    blue, band, red = figure_bands(bands)
    mid, n, err = population_counts(table, band, area_arcsec2, _EDGES)
    ref = reference_counts(mid)
    fig = plt.figure(figsize=(9.0, 5.5))
    grid = fig.add_gridspec(2, 2, height_ratios=[2, 1])
    ax = fig.add_subplot(grid[0, 0])
    ax2 = fig.add_subplot(grid[1, 0], sharex=ax)
    ax3 = fig.add_subplot(grid[:, 1])
    shown = n > 0
    ax.errorbar(mid[shown], n[shown], err[shown], fmt="o", ms=3, label=f"population ({band})")
    ax.plot(mid, ref, "k-", label="Driver et al. 2016 (Table 3)")
    ax.set_yscale("log")
    ax.set_ylabel("dN/dm (mag$^{-1}$ deg$^{-2}$)")
    ax.set_xlabel(f"{band} (AB mag)")
    ax.legend(fontsize=7)
    ax.set_title(run_title("galaxy counts", band, seed), fontsize=9)
    ax2.axhspan(0.7, 1.3, color="0.9")
    ax2.axhline(1.0, color="k", lw=0.8)
    ax2.errorbar(mid[shown], n[shown] / ref[shown], err[shown] / ref[shown], fmt="o", ms=3)
    ax2.set_xlabel(f"{band} (AB mag)")
    ax2.set_ylabel("population / published")

    kind = np.asarray(table["kind"]).astype(str)
    gal = np.isin(kind, _GALAXY_KINDS) & (np.asarray(table[f"mag_{band}"], float)
                                          < COLOUR_MAG_LIMIT)
    evolved = (np.asarray(table["template"]).astype(str) == "evolved") if "template" in \
        table.colnames else np.zeros(len(table), bool)
    evolved = evolved | (kind == "quiescent")
    m = {b: np.asarray(table[f"mag_{b}"], float) for b in (blue, band, red)}
    colours = ((f"{blue} - {band}", m[blue] - m[band], "C0"),
               (f"{band} - {red}", m[band] - m[red], "C3"))
    bins = np.arange(-2.0, 4.01, 0.1)
    for label, c, col in colours:
        for sel, ls, what in ((gal & ~evolved, "-", "star-forming"),
                              (gal & evolved, "--", "evolved")):
            v = c[sel & np.isfinite(c)]
            if v.size:
                ax3.hist(np.clip(v, bins[0], bins[-1]), bins=bins, histtype="step",
                         color=col, ls=ls, label=f"{label}, {what} ({v.size})")
    ax3.set_xlabel("colour (AB mag)")
    ax3.set_ylabel(f"galaxies per 0.1 mag ({band} < {COLOUR_MAG_LIMIT:g})")
    ax3.set_title(run_title("galaxy colours", None, seed), fontsize=9)
    ax3.legend(fontsize=7)
    fig.subplots_adjust(left=0.09, right=0.98, bottom=0.09, top=0.95, wspace=0.25, hspace=0.3)
    return fig


def save_figure(fig, path) -> Path:
    """Write ``fig`` as a PNG to ``path`` (atomically) and close it; returns the path."""
    import matplotlib.pyplot as plt

    from ..io import atomic_path

    path = Path(path)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
    return path


def write_population_figure(path, table, bands, area_arcsec2: float, seed=None) -> Path:
    """Write :func:`population_figure` as a PNG to ``path``; returns the path."""
    return save_figure(population_figure(table, bands, area_arcsec2, seed), path)
