"""Self-contained HTML report of one sample's selection, with its PNG plots beside it.

Sections: headline numbers, S(z) curves at several M_UV with their Jeffreys intervals, a
colour-colour diagram with the template tracks (:mod:`simfield.selection.tracks`), the region
the sample's colour conditions select and the truth classes of the selected detections (left
out, and the page says so, for a catalogue without the fluxes of its bands), the
truth-redshift distribution of the selection against the target window, and expected versus
observed counts per M_UV bin. Images are embedded as base64 PNG.
"""

from __future__ import annotations

import base64
from pathlib import Path

import numpy as np

__all__ = ["make_report"]

_CLASS_COLOURS = {"in_window": "#2ca02c", "lowz_galaxy": "#d62728", "higher_z_galaxy": "#8c564b",
                  "dusty": "#ff7f0e", "quiescent": "#e377c2", "star": "#17becf",
                  "dwarf": "#bcbd22", "member": "#9467bd", "icl": "#7f7f7f", "noise": "#1f77b4",
                  "blend": "#aec7e8", "shred": "#ffbb78", "spike": "#ff9896", "artefact": "#c7c7c7"}


#: S(z) labels each point k/n only when no line has more cells than this (beyond it the
#: labels run together at the default 8.5" width; n is always in the lower panel)
_MAX_LABELLED_CELLS = 24


def _save(fig, path: Path) -> str:
    """Write ``fig`` to ``path`` (PNG); returns it base64-encoded for the page."""
    from .._plot import save_png

    return base64.b64encode(save_png(fig, path, dpi=90)).decode("ascii")


def _colour_axes(sample):
    """(y colour bands, x colour bands) of the first two colour conditions sharing a band."""
    cols = [tuple(c.bands) for c in sample.conditions if c.kind == "colour"]
    for i, y in enumerate(cols):
        for x in cols[i + 1:]:
            if y[1] == x[0]:
                return y, x
    return None


def _region(sample, y, x, ys, xs):
    """Mask of the colour conditions over only these bands, on a grid of (x, y) colours."""
    from astropy.table import Table

    from .cuts import condition_mask

    yy, xx = np.meshgrid(ys, xs, indexing="ij")
    t = Table()
    for b, f in ((y[1], np.ones(yy.size)), (y[0], 10 ** (-0.4 * yy.ravel())),
                 (x[1], 10 ** (0.4 * xx.ravel()))):
        t[f"flux_{b}"], t[f"flux_err_{b}"] = f, np.full(yy.size, 1e-9)
    ok = np.ones(yy.size, bool)
    for c in sample.conditions:
        if c.kind == "colour" and set(c.bands) | set(c.slope_bands) <= {y[0], y[1], x[1]}:
            ok &= condition_mask(t, c)
    return ok.reshape(yy.shape)


def _colour(det, a, b):
    with np.errstate(divide="ignore", invalid="ignore"):
        fa, fb = np.asarray(det[f"flux_{a}"], float), np.asarray(det[f"flux_{b}"], float)
        return np.where((fa > 0) & (fb > 0), -2.5 * np.log10(fa / fb), np.nan)


def make_report(out_dir, sample, bands, det, selected, cls, tables: dict, summary: dict,
                run_dir=None) -> Path:
    """Write ``report.html`` and its PNG plots into ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
    sample : SampleConfig
        Name, window and conditions (colour conditions make the colour-colour diagram).
    bands : sequence of simfield.bands.Band or None
        Bands for the template tracks (None: no tracks).
    det : Table
        Catalogue; ``flux_<b>`` (nJy) of the colour-colour diagram's three bands, without
        which the diagram is left out (the page says so).
    selected : ndarray of bool
        Per detection.
    cls : ndarray of str
        Class of each selected detection.
    tables, summary : dict
        From :func:`simfield.selection.score.score_sample`.
    run_dir : str or Path, optional
        The run, for the page's header (scenario, version, seed, hash, depths).

    Returns
    -------
    Path
        The report.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .._plot import run_title
    from ..score.report import run_header, write_page

    out = Path(out_dir)
    z0, z1 = summary["z_window"]
    figs = []
    sentence, id_rows = (run_header(run_dir) if run_dir is not None else
                         ("Run not recorded (scored without its run directory).", []))
    seed = dict(id_rows).get("seed")
    seed = None if seed in (None, "n/a") else seed
    name = summary["sample"]

    # ---- S(z) at several M_UV, and below it the truth galaxies per cell
    comp = tables["completeness"]
    fig, (ax, axn) = plt.subplots(2, 1, figsize=(8.5, 5), sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1.2]})
    lo_col = np.asarray(comp["abs_mag_uv_lo"], float)
    n_col, k_col = np.asarray(comp["n"]), np.asarray(comp["k"])
    zlo, zhi = np.asarray(comp["z_lo"], float), np.asarray(comp["z_hi"], float)
    zc = 0.5 * (zlo + zhi)
    mlo = np.unique(lo_col)
    # the (up to) four M_UV bins with the most truth galaxies inside the window
    n_win = [n_col[(lo_col == m) & (zc >= z0) & (zc <= z1)].sum() for m in mlo]
    shown = sorted(mlo[np.argsort(n_win)[::-1][:4]])
    # k/n beside each point only while the cells are few enough to read (~4 mm apart at
    # the most cells a line has); always in the lower panel's n and in completeness.ecsv
    cells = max([int(np.sum((lo_col == m) & (n_col > 0))) for m in shown] or [0])
    label = cells <= _MAX_LABELLED_CELLS
    for j, m in enumerate(shown):
        r = (lo_col == m) & (n_col > 0)
        mhi = float(np.asarray(comp["abs_mag_uv_hi"], float)[lo_col == m][0])
        # the lines side by side within their cells (an eighth of a cell apart), so points
        # at the same S (often 0) do not hide each other
        zm = zc[r] + (j - (len(shown) - 1) / 2) * (zhi - zlo)[r] / 8
        f = np.asarray(comp["fraction"], float)[r]
        lo, hi = np.asarray(comp["fraction_lo"])[r], np.asarray(comp["fraction_hi"])[r]
        line = ax.plot(zm, f, "o-", ms=3, lw=0.8, label=f"M_UV {m:g}..{mhi:g} (AB)")
        colour = line[0].get_color()
        # bars only for cells of at least 3 galaxies; smaller cells keep their point
        big = n_col[r] >= 3
        ax.errorbar(zm[big], f[big], yerr=[(f - lo)[big], (hi - f)[big]], fmt="none",
                    elinewidth=0.6, ecolor=colour)
        for zi, fi, ki, ni in zip(zm, f, k_col[r], n_col[r]) if label else ():
            ax.annotate(f"{ki}/{ni}", (zi, fi), fontsize=6, color=colour,
                        xytext=(2, 2), textcoords="offset points", gid="count",
                        alpha=1.0 if ni >= 3 else 0.5)
        every = lo_col == m
        axn.stairs(n_col[every], np.append(zlo[every], zhi[every][-1]), color=colour, lw=0.9,
                   gid="n_cells")
    for a in (ax, axn):
        a.axvspan(z0, z1, color="0.9", zorder=0, label="target window" if a is ax else None)
    ax.set(ylabel="S = P(detected and selected)", ylim=(-0.03, 1.03),
           title=run_title(f"selection completeness S(z), sample {name}", None, seed))
    axn.set(xlabel="true redshift z", ylabel="truth galaxies\nper cell, n")
    axn.set_yscale("symlog", linthresh=1.0)
    axn.set_ylim(bottom=0)
    # beside the axes: it never hides a point, and no search for the emptiest corner (that
    # search measured every k/n label: a third of the figure's drawing time)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    figs.append(("Selection completeness S(z)", _save(fig, out / "completeness_z.png"),
                 "Points: S = k/n of the truth galaxies per (M_UV, z) cell, the lines set side "
                 "by side within their cells"
                 + (", each labelled k/n (faint where n < 3)" if label else "")
                 + "; bars: Jeffreys intervals (they contain their point), drawn only for "
                 "cells of 3 or more galaxies; below: n per cell; every cell's n and k in "
                 "completeness.ecsv."))

    # ---- colour-colour diagram (of a catalogue with the fluxes of its bands)
    axes = _colour_axes(sample)
    lacking = [] if axes is None else [f"flux_{b}" for b in (*axes[0], axes[1][1])
                                       if f"flux_{b}" not in det.colnames]
    if axes is not None and not lacking:
        y, x = axes
        fig, ax = plt.subplots(figsize=(6, 5))
        ys, xs = np.linspace(-1.5, 4.0, 221), np.linspace(-1.0, 2.5, 141)
        ax.contourf(xs, ys, _region(sample, y, x, ys, xs).astype(float), levels=[0.5, 1.5],
                    colors=["#2ca02c"], alpha=0.15)
        if bands is not None:
            from .tracks import FAMILIES, band_tracks

            names = [b.name for b in bands]
            zt = np.linspace(0.1, 15.0, 300)
            for fam, ls in zip(FAMILIES, ("-", "--", ":")):
                mt = band_tracks(bands, zt, fam)
                with np.errstate(invalid="ignore"):  # inf - inf where both bands drop out
                    yc = mt[:, names.index(y[0])] - mt[:, names.index(y[1])]
                    xc = mt[:, names.index(x[0])] - mt[:, names.index(x[1])]
                ax.plot(xc, np.minimum(yc, 3.9), "k", ls=ls, lw=0.8, label=f"{fam} track")
                w = (zt >= z0) & (zt <= z1)
                ax.plot(xc[w], np.minimum(yc[w], 3.9), "g", ls=ls, lw=2.5)
        yc, xc = _colour(det, *y), _colour(det, *x)
        ax.plot(xc[~selected], yc[~selected], ".", color="0.75", ms=2, label="not selected")
        for c in np.unique(cls):
            s = cls == c
            ax.plot(xc[selected][s], yc[selected][s], "o", ms=4, color=_CLASS_COLOURS.get(c),
                    label=f"{c} ({int(s.sum())})")
        ax.set(xlabel=f"{x[0]} - {x[1]} (AB mag)", ylabel=f"{y[0]} - {y[1]} (AB mag)",
               xlim=(xs[0], xs[-1]), ylim=(ys[0], ys[-1]),
               title=run_title(f"colour-colour diagram, sample {name}", None, seed))
        ax.legend(fontsize=6, loc="upper right")
        figs.append(("Colour-colour diagram", _save(fig, out / "colour_colour.png"),
                     "Shaded: the region the colour conditions on these bands select; lines: "
                     "template tracks z 0.1-15 (thick green inside the window); points: "
                     "measured colours (fluxes > 0 only), selected ones by truth class with "
                     "counts."))

    # ---- redshift distribution and counts
    zd = tables["redshift_distribution"]
    vol = tables["effective_volume"]
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(10, 4))
    a1.bar(zd["z_lo"], zd["n_selected"], width=np.asarray(zd["z_hi"]) - np.asarray(zd["z_lo"]),
           align="edge", color="#1f77b4")
    a1.axvspan(z0, z1, color="g", alpha=0.15, label="target window")
    a1.set(xlabel="truth redshift of selected detections", ylabel="selected detections (count)",
           title=run_title(f"redshifts of sample {name}", None, seed))
    a1.legend(fontsize=7)
    comp_k = np.asarray(comp["k"]).reshape(len(vol), -1)
    mm = 0.5 * (np.asarray(vol["abs_mag_uv_lo"]) + np.asarray(vol["abs_mag_uv_hi"]))
    a2.step(mm, vol["n_expected"], where="mid", label="expected (S x phi x V)")
    # unclipped: the points at 0 sit on the axis
    a2.plot(mm, comp_k.sum(axis=1), "ko", ms=4, label="observed (truth galaxies selected)",
            clip_on=False)
    a2.set(xlabel="true M_UV (AB mag)", ylabel="selected galaxies per M_UV bin (count)",
           title=run_title(f"expected and observed counts, sample {name}", None, seed))
    a2.legend(fontsize=7)
    from matplotlib.ticker import MaxNLocator

    for ax in (a1, a2):  # counts from 0 (and up to 1 at least, when nothing was selected)
        ax.set_ylim(0, max(1.0, ax.get_ylim()[1]))
    a1.yaxis.set_major_locator(MaxNLocator(integer=True))  # detections: whole numbers
    figs.append(("Redshift distribution and counts", _save(fig, out / "counts.png"),
                 "Left: truth redshifts of the matched selected detections. Right: expected "
                 "versus observed selected galaxies, all z bins."))

    if "pz" in det.colnames and det.meta.get("pz_grid") and selected.any():
        # P(z) of what the sample selected: the contaminants' shapes say why they got in
        zg = np.asarray(det.meta["pz_grid"], float)
        pz = np.asarray(det["pz"], float)[selected]
        fig, ax = plt.subplots(figsize=(7, 4))
        shown = set()
        for row, c in zip(pz, cls):
            if not np.all(np.isfinite(row)):
                continue
            inw = c == "in_window"
            label = None if c in shown else f"{c} ({int(np.sum(cls == c))})"
            shown.add(c)
            ax.plot(zg, row, lw=1.4 if inw else 0.8, ls="-" if inw else "--",
                    color=_CLASS_COLOURS.get(c, "0.4"), alpha=0.8, label=label)
        ax.axvspan(z0, z1, color="g", alpha=0.12, label="target window")
        ax.set(xlabel="redshift z", ylabel="P(z) (per unit z)", xlim=(0, zg.max()),
               title=run_title(f"P(z) of the selected detections, sample {name}", None, seed))
        ax.legend(fontsize=7)
        figs.append(("P(z) of the selected detections", _save(fig, out / "pz_selected.png"),
                     "Photometric-redshift P(z) (photoz.fits) of every selected detection, by "
                     "its truth class (solid: in the target window; dashed: contaminants); the "
                     "count of each class in the legend."))

    cw = summary["counts_window"]
    rows = [("scenario", sentence), *id_rows, ("sample", summary["sample"]),
            ("target window", f"{z0:g} <= z <= {z1:g}"),
            ("selected detections", summary["n_selected"]),
            ("purity (in window / selected)",
             "n/a" if summary["purity"] is None else
             f"{summary['purity']:.3f} ({summary['contamination']['in_window']} of "
             f"{summary['n_selected']})"),
            ("contamination", ", ".join(f"{k}: {v}" for k, v in summary["contamination"].items()
                                        if v)),
            ("in window: observed / expected", f"{cw['n_observed']} / {cw['n_expected']:.2f}"),
            ("Poisson P(N = obs), P(N = 0)", f"{cw['p_equal']:.3g}, {cw['p_zero']:.3g}"),
            ("source-plane area (arcsec^2)", f"{summary['area_source_arcsec2']:.1f}")]
    if lacking:
        rows.append(("colour-colour diagram", f"not drawn: the catalogue has no "
                                              f"{', '.join(lacking)} (nJy)"))
    return write_page(out / "report.html", f"simfield selection: {name}",
                      f"simfield selection, sample {name}", rows, figs)
