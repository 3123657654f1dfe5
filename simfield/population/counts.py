"""Galaxy number counts of a population against published near-infrared deep-field counts.

Reference: differential counts of galaxies in the 1.6 um band of deep space-based fields,
log10 (dN/dm / (mag^-1 deg^-2)) at integer AB magnitudes 20-29, after Windhorst et al. 2011,
ApJS 193, 27 (their near-infrared panchromatic counts; shape read off the figure [from memory,
approximate: ~0.1 dex]), interpolated linearly in log between the magnitudes:

    m:      20    21    22    23    24    25    26    27    28    29
    log N: 4.00  4.28  4.52  4.75  4.95  5.12  5.27  5.40  5.52  5.62

The figure gives counts per 0.5 mag (the convention of that compilation [from memory]); the
values above are per mag, i.e. the figure's values + log10 2. Checks of the normalisation:
N(< 26.14 AB) = 4.5e5 deg^-2 from this table against 4e5 deg^-2 to H <= 24.75 (Vega) of Yan et
al. 1998, ApJ 503, L19 (abstract; H_AB = H_Vega + 1.39 at 1.6 um [from memory]), and log N
within 0.15 dex of the deep H-band counts recalled in tests/test_population.py (Metcalfe et al.
2006, MNRAS 370, 1257 [from memory]). N(< 28) ~ 260 arcmin^-2; slope ~0.25-0.3 dex/mag at
AB 20-23 flattening to ~0.12 dex/mag at 27-29. At AB 20-22 the table is ~0.2 dex above what
the published K-band count of Cimatti et al. 2002, A&A 391, L1 (480 galaxies with Ks < 20
Vega over 52 arcmin^2, abstract) implies with the H - K colours of galaxies
(tests/test_population.py: the population meets that count and its redshift distribution).

The population's counts are those of its truth table in the band
whose pivot is nearest 1.6 um (galaxies of every family, intrinsic magnitudes).

``python -m simfield.population.counts --out counts.png [overrides]`` draws the scenario's
population over ``--side`` arcsec and writes the figure a run writes on request
(:mod:`.figure`: counts, their ratio to the reference, colours); it prints the ratio per half-magnitude bin and its split by redshift (light-cone
galaxies) and by contaminant family. Units: AB mag, counts per mag per
deg^2.
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

__all__ = ["REFERENCE_MAGS", "REFERENCE_LOG_COUNTS", "reference_counts", "population_counts",
           "split_counts", "main"]

REFERENCE_MAGS = np.arange(20.0, 29.5, 1.0)
REFERENCE_LOG_COUNTS = np.array([4.00, 4.28, 4.52, 4.75, 4.95, 5.12, 5.27, 5.40, 5.52, 5.62])
_GALAXY_KINDS = ("galaxy", "dusty", "quiescent")


def reference_counts(mag):
    """Published differential counts dN/dm (mag^-1 deg^-2) at AB magnitude ``mag``."""
    return 10.0 ** np.interp(mag, REFERENCE_MAGS, REFERENCE_LOG_COUNTS)


def population_counts(table, band: str, area_arcsec2: float, edges):
    """(centres, dN/dm per mag per deg^2, Poisson error) of the galaxies of a truth table in
    ``band`` over ``area_arcsec2``, in the magnitude bins ``edges`` (AB)."""
    kind = np.asarray(table["kind"]).astype(str)
    m = np.asarray(table[f"mag_{band}"], float)[np.isin(kind, _GALAXY_KINDS)]
    n, _ = np.histogram(m, bins=edges)
    scale = 3600.0 ** 2 / area_arcsec2 / np.diff(edges)
    return 0.5 * (edges[1:] + edges[:-1]), n * scale, np.sqrt(n) * scale


#: Redshift ranges of the split printed by :func:`main`.
SPLIT_REDSHIFTS = ((0.0, 1.0), (1.0, 2.0), (2.0, 3.0), (3.0, 5.0), (5.0, np.inf))


def split_counts(table, band: str, area_arcsec2: float, edges):
    """{label: dN/dm per mag per deg^2} in the bins ``edges`` (AB) for the light-cone galaxies
    in each redshift range of :data:`SPLIT_REDSHIFTS` and for each contaminant family."""
    kind = np.asarray(table["kind"]).astype(str)
    z = np.asarray(table["redshift"], float)
    m = np.asarray(table[f"mag_{band}"], float)
    scale = 3600.0 ** 2 / area_arcsec2 / np.diff(edges)
    masks = {f"z{lo:g}-{hi:g}": (kind == "galaxy") & (z >= lo) & (z < hi)
             for lo, hi in SPLIT_REDSHIFTS}
    masks.update({k: kind == k for k in _GALAXY_KINDS[1:]})
    return {k: np.histogram(m[v], bins=edges)[0] * scale for k, v in masks.items()}


def main(argv=None) -> int:
    """Command line: the figure of the scenario's counts against the reference."""
    from .. import cli
    from ..bands import make_bands
    from ..random import stream
    from .figure import figure_bands, write_population_figure
    from .lightcone import make_population

    ap = argparse.ArgumentParser(prog="python -m simfield.population.counts",
                                 description="Galaxy counts of the scenario's population "
                                             "against published near-infrared counts.")
    ap.add_argument("--out", default="counts.png", help="figure path (PNG)")
    ap.add_argument("--side", type=float, default=180.0, help="field side (arcsec)")
    ap.add_argument("overrides", nargs="*", help="scenario overrides, e.g. seed=3")
    a = ap.parse_args(argv)
    sc = cli.preflight(list(a.overrides))[0]
    bands = make_bands(sc)
    band = figure_bands(bands)[1]
    half = a.side / 2
    t = make_population(sc.population, bands, (-half, half), (-half, half),
                        stream(sc.seed, "population", "counts"))
    edges = np.arange(20.0, 29.01, 0.5)
    mid, n, err = population_counts(t, band, a.side ** 2, edges)
    ref = reference_counts(mid)
    parts = split_counts(t, band, a.side ** 2, edges)
    print("  mag  population   reference  ratio   " + " ".join(f"{k:>9s}" for k in parts)
          + "   (columns after ratio: share of the reference)")
    for i, (c, v, r) in enumerate(zip(mid, n, ref)):
        print(f"{c:5.2f}  {v:10.0f}  {r:10.0f}  {v / r:5.2f}   " +
              " ".join(f"{p[i] / r:9.2f}" for p in parts.values()))
    write_population_figure(a.out, t, bands, a.side ** 2, sc.seed)
    print(f"wrote {a.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
