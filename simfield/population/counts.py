"""Galaxy number counts of a population against published near-infrared deep-field counts.

Two references, differential counts dN/dm (mag^-1 deg^-2) against AB magnitude:

1. 1.6 um (:data:`H_COUNTS_ROWS`, :func:`reference_counts`): the galaxy counts compiled by Driver
   et al. 2016, ApJ 827, 108, their Table 3 (counts per 0.5 mag per deg^2 at the centres of
   0.5-mag bins, with errors and the table's own data-set number), read in a stored copy of that
   table (repository ICRAR/shark, file data/lf/numbercounts/Driver16_numbercounts.data, whose
   plotting code labels the values per 0.5 mag, as does the note of the reader in mirochaj/
   ebl_utils, ebl_utils/models/driver2016.py). Kept: the space-based 1.6 um rows of the three
   data sets with bins centred on x.25 and x.75 (the table's sets 3, 4 and 5; AB 20.25-28.25).
   Per bin, the sets are averaged with inverse-variance weights (their Poisson errors) and
   doubled to per mag; between bin centres the log is interpolated linearly; NaN outside.
   Checked against what could be read independently (tests/test_counts.py): the table summed
   over every magnitude (with its ground-based rows brighter than AB 20) gives the 1.6 um
   background light of Driver et al. 2016, Table 2 (10.12 nW m^-2 sr^-1, read in mirochaj/ares,
   ares/data/driver2016.py) to 2 % and 0.92 of Koushan et al. 2021, MNRAS 503, 2033, Table 3
   (11.17, read in mirochaj/ebl_utils, ebl_utils/models/koushan2021.py); read per mag instead it
   would give half. Its integral to H_AB = 26.14 is 1.2 times the 4e5 deg^-2 to H <= 24.75
   (Vega) of Yan et al. 1998, ApJ 503, L19 (abstract, read at https://core.ac.uk/works/43113350;
   H_AB = H_Vega + 1.39 at 1.6 um [from memory]), which also gives a slope of 0.31 fainter than
   H = 20 Vega (0.29 in this table from AB 20 to 24).

   The earlier reference, a table after Windhorst et al. 2011, ApJS 193, 27 recalled from their
   figure (:data:`RECALLED_MAGS`, :data:`RECALLED_LOG_COUNTS`, :func:`recalled_counts`; [from
   memory], per mag), is kept for the record: it lies 0.11-0.20 dex above the read counts at AB
   20-22.5, within 0.1 dex at 22.5-26 and 0.19-0.37 dex below them at 26-28::

       m:      20    21    22    23    24    25    26    27    28    29
       log N: 4.00  4.28  4.52  4.75  4.95  5.12  5.27  5.40  5.52  5.62

2. 2.15 um (:data:`K_REFERENCE_MAGS`, :data:`K_REFERENCE_LOG_COUNTS`,
   :func:`reference_counts_k`): the Ks-band galaxy counts of Weaver et al. 2022, ApJS 258, 11
   (their Table 2, the profile-fitted catalogue over the deepest part of their 1.3 deg^2 [from
   memory]), per mag per deg^2 at the centres of 0.5 mag bins, read in a stored copy of that
   table (repository mirochaj/ares, file ares/data/weaver2022.py, whose note leaves open whether
   the values are per mag or per 0.5-mag bin). Per mag is the reading that meets two independent
   published K counts, each read in its abstract: 480 galaxies with Ks < 20 Vega (21.84 AB) over
   52 arcmin^2 (Cimatti et al. 2002, A&A 391, L1, read at
   https://arxiv.org/abs/astro-ph/0207191), i.e. 9.2 arcmin^-2, against 11.3 arcmin^-2
   integrated from this table, and ~5e5 deg^-2 to K = 24 Vega (25.85 AB) (Djorgovski et al.
   1995, ApJ 438, L13, read at http://adsabs.harvard.edu/doi/10.1086/187703) against 3.95e5
   (per 0.5-mag bin would give half of each: 0.61 and 0.40 of them). Bins fainter than 25.75
   are left out: the published counts turn over there (5.24 at 25.75, 5.13 at 26.25), the
   survey's incompleteness. Ks_AB = Ks_Vega + 1.84 [from memory]. The ground-based 2.15 um
   rows of Driver et al. 2016, Table 3 (read per 0.5 mag as above) lie 0.06 dex below these
   at AB 20-20.5 (0.36 dex if that table were read per mag), which supports both readings.

The population's counts are those of its truth table in the band whose pivot is nearest 1.6 um
(galaxies of every family, intrinsic magnitudes).

``python -m simfield.population.counts --out counts.png [overrides]`` draws the scenario's
population over ``--side`` arcsec and writes the figure a run writes on request
(:mod:`.figure`: counts, their ratio to the reference, colours); it prints the ratio per
half-magnitude bin and its split by redshift (light-cone galaxies) and by contaminant family,
then the same against the 2.15 um counts in a top-hat band of that wavelength (:data:`K_BAND`,
added to the draw for this comparison only; the selection band stays the scenario's).
Units: AB mag, counts per mag per deg^2.
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

__all__ = ["H_COUNTS_ROWS", "RECALLED_MAGS", "RECALLED_LOG_COUNTS", "K_REFERENCE_MAGS",
           "K_REFERENCE_LOG_COUNTS", "K_BAND", "binned_counts", "reference_counts", "recalled_counts",
           "reference_counts_k", "population_counts", "split_counts", "main"]

#: 1.6 um counts of Driver et al. 2016, Table 3, read in ICRAR/shark
#: data/lf/numbercounts/Driver16_numbercounts.data (module docstring): rows of (bin centre AB,
#: counts per 0.5 mag per deg^2, their error, the table's data-set number), as stored.
H_COUNTS_ROWS = np.array([
    (20.25, 3621.172, 539.812, 3), (20.75, 5713.404, 678.056, 3),
    (21.25, 7161.873, 759.157, 3), (21.75, 10380.692, 913.969, 3),
    (22.25, 14404.217, 1076.622, 3), (22.75, 20359.033, 1279.961, 3),
    (23.25, 28727.963, 1520.445, 3), (23.75, 36533.602, 1714.607, 3),
    (24.25, 50857.348, 2022.997, 3), (24.75, 63249.801, 2256.046, 3),
    (22.25, 11953.2, 3661.03, 4), (22.75, 18310.3, 5282.24, 4), (23.25, 24052.4, 6623.93, 4),
    (23.75, 44618.2, 10772.1, 4), (24.25, 51217.0, 12016.6, 4), (24.75, 57169.1, 13122.5, 4),
    (25.25, 92667.1, 18805.7, 4), (25.75, 118901.0, 22627.7, 4),
    (26.25, 179214.0, 30386.6, 4), (26.75, 231058.0, 36483.4, 4),
    (27.25, 283466.0, 42299.9, 4), (27.75, 344234.0, 48662.6, 4),
    (28.25, 458417.0, 59486.1, 4),
    (20.25, 7128.71, 2520.38, 5), (20.75, 5346.54, 2182.71, 5), (21.25, 5346.54, 2182.71, 5),
    (21.75, 14257.4, 3564.36, 5), (22.25, 20076.9, 4489.33, 5), (22.75, 26654.0, 5227.28, 5),
    (23.25, 36658.5, 6196.41, 5), (23.75, 44965.2, 6938.3, 5), (24.25, 48174.4, 7262.56, 5),
    (24.75, 66095.9, 8604.95, 5), (25.25, 80280.8, 9595.41, 5), (25.75, 104554.0, 11082.7, 5),
    (26.25, 150506.0, 13461.7, 5), (26.75, 209922.0, 16100.3, 5),
    (27.25, 253448.0, 17921.4, 5), (27.75, 365688.0, 21815.2, 5),
    (28.25, 419950.0, 23699.1, 5)])
#: 1.6 um table after Windhorst et al. 2011 [from memory], per mag (module docstring).
RECALLED_MAGS = np.arange(20.0, 29.5, 1.0)
RECALLED_LOG_COUNTS = np.array([4.00, 4.28, 4.52, 4.75, 4.95, 5.12, 5.27, 5.40, 5.52, 5.62])
#: 2.15 um counts of Weaver et al. 2022, Table 2 (deepest area), read in mirochaj/ares
#: ares/data/weaver2022.py: bin centres (AB) and log10 counts per mag per deg^2.
K_REFERENCE_MAGS = np.arange(19.25, 25.8, 0.5)
K_REFERENCE_LOG_COUNTS = np.array([3.65, 3.86, 4.02, 4.16, 4.29, 4.42, 4.54, 4.66, 4.78, 4.88,
                                   4.97, 5.07, 5.18, 5.24])
_GALAXY_KINDS = ("galaxy", "dusty", "quiescent")
#: (name, centre nm, width nm, peak throughput) of the 2.15 um band of the command line's
#: comparison with :func:`reference_counts_k` (a Ks-like top hat; project choice).
K_BAND = ("k215", 2150.0, 320.0, 0.40)


def binned_counts(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(bin centres AB, log10 counts per mag per deg^2) of rows of Driver et al. 2016, Table 3
    as :data:`H_COUNTS_ROWS` holds them (centre, counts per 0.5 mag, error, data set): the data
    sets at each centre averaged with inverse-variance weights, doubled to per mag."""
    mags = np.unique(rows[:, 0])
    logn = np.empty(mags.size)
    for i, m in enumerate(mags):
        n, err = rows[rows[:, 0] == m, 1:3].T
        w = err ** -2.0
        logn[i] = np.log10(2.0 * np.sum(w * n) / np.sum(w))
    return mags, logn


def reference_counts(mag):
    """Published differential counts dN/dm (mag^-1 deg^-2) at 1.6 um at AB magnitude ``mag``
    (Driver et al. 2016, Table 3, read), NaN outside the bin centres 20.25-28.25."""
    mag = np.asarray(mag, dtype=float)
    mags, logn = binned_counts(H_COUNTS_ROWS)
    inside = (mag >= mags[0]) & (mag <= mags[-1])
    return np.where(inside, 10.0 ** np.interp(mag, mags, logn), np.nan)


def recalled_counts(mag):
    """Differential counts dN/dm (mag^-1 deg^-2) at 1.6 um at AB magnitude ``mag`` of the table
    recalled after Windhorst et al. 2011 [from memory] (kept for the record)."""
    return 10.0 ** np.interp(mag, RECALLED_MAGS, RECALLED_LOG_COUNTS)


def reference_counts_k(mag):
    """Published differential counts dN/dm (mag^-1 deg^-2) at 2.15 um at AB magnitude ``mag``
    (Weaver et al. 2022), NaN outside the tabulated bin centres 19.25-25.75."""
    mag = np.asarray(mag, dtype=float)
    inside = (mag >= K_REFERENCE_MAGS[0]) & (mag <= K_REFERENCE_MAGS[-1])
    return np.where(inside, 10.0 ** np.interp(mag, K_REFERENCE_MAGS, K_REFERENCE_LOG_COUNTS),
                    np.nan)


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


def _print_ratios(mid, n, ref, parts, label):
    print(f"{label}\n  mag  population   reference  ratio   " + " ".join(f"{k:>9s}" for k in parts)
          + "   (columns after ratio: share of the reference)")
    for i, (c, v, r) in enumerate(zip(mid, n, ref)):
        print(f"{c:5.2f}  {v:10.0f}  {r:10.0f}  {v / r:5.2f}   " +
              " ".join(f"{p[i] / r:9.2f}" for p in parts.values()))


def main(argv=None) -> int:
    """Command line: the figure of the scenario's counts against the reference."""
    import dataclasses

    from pathlib import Path

    from .. import cli
    from .._argparse import ArgError, check_out_folder
    from ..errors import ConfigError
    from ..bands import make_band, make_bands
    from ..random import stream
    from .figure import figure_bands, write_population_figure
    from .lightcone import make_population, selection_band_index

    ap = argparse.ArgumentParser(prog="python -m simfield.population.counts",
                                 description="Galaxy counts of the scenario's population "
                                             "against published near-infrared counts.")
    ap.add_argument("--out", default="counts.png", help="figure path (PNG)")
    ap.add_argument("--side", type=float, default=180.0, help="field side (arcsec)")
    ap.add_argument("overrides", nargs="*", help="scenario overrides, e.g. seed=3")
    a = ap.parse_args(argv)
    prog = "python -m simfield.population.counts"
    try:  # every refusal before the population is drawn, in one line
        if not (np.isfinite(a.side) and 0 < a.side <= 3600):
            raise ArgError(f"--side: {a.side:g} must be in (0, 3600] (arcsec)")
        check_out_folder(Path(a.out).absolute().parent, "--out")
        sc = cli.preflight(list(a.overrides))[0]
    except ArgError as exc:
        print(f"{prog}: error: {exc}", file=sys.stderr)
        return 2
    except ConfigError as exc:
        print(f"{prog}: error: {cli.refusal_line(exc)}", file=sys.stderr)
        return 2
    bands = make_bands(sc)
    band = figure_bands(bands)[1]
    # the 2.15 um band joins the draw; the selection band is fixed first so it stays the same
    pop = dataclasses.replace(sc.population,
                              selection_band=bands[selection_band_index(sc.population,
                                                                        bands)].name)
    half = a.side / 2
    t = make_population(pop, bands + [make_band(*K_BAND)], (-half, half), (-half, half),
                        stream(sc.seed, "population", "counts"))
    for name, ref_fn, edges, label in (
            (band, reference_counts, np.arange(20.0, 28.51, 0.5),
             f"{band} against the 1.6 um counts of Driver et al. 2016"),
            (K_BAND[0], reference_counts_k, np.arange(19.0, 26.01, 0.5),
             f"{K_BAND[0]} against the 2.15 um counts of Weaver et al. 2022")):
        mid, n, _ = population_counts(t, name, a.side ** 2, edges)
        _print_ratios(mid, n, ref_fn(mid), split_counts(t, name, a.side ** 2, edges), label)
    write_population_figure(a.out, t, bands, a.side ** 2, sc.seed)
    print(f"wrote {a.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
