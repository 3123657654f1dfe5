"""Self-contained HTML report of a scoring run, with its PNG plots beside it.

Sections: headline numbers, colour preview of the mosaic (three bands), PSF images, completeness
and purity curves with their intervals and fits, completeness against size, redshift and
magnification, photometric bias, and the breakdown of false detections with example cut-outs.
Images are embedded as base64 PNG so the page needs no other file.
"""

from __future__ import annotations

import base64
import html
import textwrap
from pathlib import Path

import numpy as np

from . import metrics

__all__ = ["make_report"]

_CAUSE_COLOURS = {"artefact": "#7f7f7f", "persistence": "#8c564b", "spike": "#d62728",
                  "shred": "#ff7f0e", "blend": "#9467bd", "stripe": "#17becf",
                  "noise": "#1f77b4"}


def _save(fig, path: Path) -> str:
    """Write ``fig`` to ``path`` (PNG); returns it base64-encoded for the page."""
    from .._plot import save_png

    return base64.b64encode(save_png(fig, path, dpi=90)).decode("ascii")


def _stretch(img, lo, hi):
    # asinh stretch between the given levels (common practice for deep-field previews)
    x = np.clip((img - lo) / max(hi - lo, 1e-30), 0, None)
    return np.clip(np.arcsinh(10 * x) / np.arcsinh(10), 0, 1)


def _plot_fraction(ax, x, t, ok, colour, label):
    """Fractions with their interval as error bars from ``fraction_lo`` to ``fraction_hi``
    (the Jeffreys interval holds k/n, so the bars reach the point, e.g. up to 1 at k = n)."""
    f = np.asarray(t["fraction"], float)[ok]
    lo, hi = np.asarray(t["fraction_lo"], float)[ok], np.asarray(t["fraction_hi"], float)[ok]
    # clipped at 0: rounding in the table must not turn a bar that ends at its point inward
    return ax.errorbar(x, f, yerr=[np.clip(f - lo, 0, None), np.clip(hi - f, 0, None)], fmt="o",
                       ms=3, color=colour, elinewidth=1.2,
                       ecolor=colour, alpha=0.8, label=label)


def _band_order(run_dir: Path) -> list[str]:
    names = sorted(p.name[len("mosaic_"):-len(".fits")] for p in run_dir.glob("mosaic_*.fits"))
    bpath = run_dir / "bands.ecsv"
    if bpath.is_file():
        from astropy.table import Table

        t = Table.read(bpath, format="ascii.ecsv")
        if "pivot_nm" in t.colnames:  # else (an older injection folder) by name
            piv = {str(n): float(p) for n, p in zip(t["name"], t["pivot_nm"])}
            names.sort(key=lambda n: piv.get(n, np.inf))
    return names


def _sample_step(shape, max_pix: float) -> int:
    """Stride (pixels) that leaves at most ``max_pix`` pixels of an image of ``shape``."""
    return max(1, int(np.ceil(np.sqrt(float(np.prod(shape)) / max_pix))))


def _colour_preview(run_dir: Path, max_side: int = 800):
    """Three-band asinh preview from strided rows of the mosaics' memory maps (every
    ``step``-th pixel; no mosaic is read whole)."""
    from .run import image_map

    names = _band_order(run_dir)
    if not names:
        return None, []
    pick = [names[0], names[len(names) // 2], names[-1]] if len(names) >= 3 else \
        (names + names * 3)[:3]
    chans = [image_map(run_dir / f"mosaic_{n}.fits", "IMAGE") for n in pick]
    step = max(1, int(np.ceil(max(chans[0].shape) / max_side)))
    rgb = []
    for c in chans[::-1]:  # reddest band as red
        c = np.nan_to_num(np.asarray(c[::step, ::step], float))
        med = np.median(c)
        mad = 1.4826 * np.median(np.abs(c - med))
        rgb.append(_stretch(c, med - mad, med + 200 * mad))
    return np.dstack(rgb), pick[::-1]


def run_header(run_dir, band: str | None = None) -> tuple[str, list]:
    """The scenario in one sentence and the run's identity rows for a report's header.

    Read from the mosaics' primary headers (``SIMFVER``, ``SIMFSEED``, ``SIMFHASH``),
    ``scenario.yaml`` and the run's ``summary.json`` (measured depths, AB mag). Missing files
    give "n/a" values, not errors (a score of an injection folder has no scenario).
    """
    import json

    from astropy.io import fits

    run_dir = Path(run_dir)
    hdr = {}
    mos = sorted(run_dir.glob("mosaic_*.fits"))
    pick = run_dir / f"mosaic_{band}.fits" if band else (mos[0] if mos else None)
    if pick is not None and pick.is_file():
        hdr = fits.getheader(pick, 0)
    sc = {}
    if (run_dir / "scenario.yaml").is_file():
        import yaml

        sc = yaml.safe_load((run_dir / "scenario.yaml").read_text()) or {}
    tel, srv, lens = sc.get("telescope", {}), sc.get("survey", {}), sc.get("lens", {})
    names = [b.get("name") for b in tel.get("bands", [])]
    if srv:
        sentence = (f"Telescope '{tel.get('name', '?')}' ({tel.get('diameter_m', '?')} m), a "
                    f"{srv.get('width_arcsec', '?'):g}\" x {srv.get('height_arcsec', '?'):g}\" "
                    f"field, {srv.get('n_exposures', '?')} exposures of "
                    f"{srv.get('exposure_time_s', '?'):g} s per band in {', '.join(names)}"
                    + (f", scored in {band}" if band else "")
                    + (f", lensed by a '{lens.get('kind')}' lens at z = {lens.get('redshift')}"
                       if lens.get("kind", "none") != "none" else ", no lens") + ".")
    else:
        sentence = "Scenario not recorded (no scenario.yaml in the run directory)."
    d = {}
    if (run_dir / "summary.json").is_file():
        d = json.loads((run_dir / "summary.json").read_text()).get("depth_ab", {})

    def _depth(b):
        v = d.get(b, {}).get("measured_5sigma")
        return "n/a" if v is None else (
            f"{v:.2f} (5 sigma, {d[b].get('aperture_radius_arcsec', float('nan')):g}\" "
            "radius aperture)")

    rows = [("simfield version", hdr.get("SIMFVER", "n/a")),
            ("seed", hdr.get("SIMFSEED", "n/a")),
            ("configuration hash", hdr.get("SIMFHASH", "n/a"))]
    if band:
        rows.append((f"measured depth of {band} (AB)", _depth(band)))
    else:
        rows.append(("measured depths (AB, 5 sigma)",
                     ", ".join(f"{b}: {_depth(b).split(' ')[0]}" for b in names or d) or "n/a"))
    return sentence, rows


def make_report(out_dir, truth: dict, det, tables: dict, fits_: dict, summary: dict,
                band: str) -> Path:
    """Write ``report.html`` and its PNG plots into ``out_dir``.

    Parameters
    ----------
    out_dir : Path
        Output directory.
    truth : dict
        As returned by :func:`simfield.score.run.load_truth`.
    det : Table
        Detections (``ra``, ``dec`` deg, ``mag`` AB).
    tables : dict of Table
        Tables computed by :func:`simfield.score.run.score_run`.
    fits_ : dict
        Completeness fits by model name (:class:`~simfield.score.metrics.CompletenessFit` or an
        error message).
    summary : dict
        Headline numbers.
    band : str
        Band scored.

    Returns
    -------
    Path
        The report file.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from astropy.io import fits
    from astropy.wcs import WCS

    from .._plot import compass, count_labels, run_title, scale_bar, sky_directions

    out = Path(out_dir)
    run_dir = Path(truth["run_dir"])
    figs = []  # (title, base64, caption)
    sentence, id_rows = run_header(run_dir, band)
    seed = dict(id_rows).get("seed")
    seed = None if seed == "n/a" else seed
    mpath = run_dir / f"mosaic_{band}.fits"
    wcs = WCS(fits.getheader(mpath, "IMAGE")) if mpath.is_file() else None
    pix = float(truth["pixel_scale"])  # arcsec per mosaic pixel
    if wcs is not None:
        ny, nx = truth["sci"].shape
        north, east = sky_directions(wcs, 0.5 * (nx - 1), 0.5 * (ny - 1))
    else:
        north, east = np.array([0.0, 1.0]), np.array([-1.0, 0.0])

    rgb, used = _colour_preview(run_dir)
    if rgb is not None:
        ny, nx = truth["sci"].shape
        fig, ax = plt.subplots(figsize=(6, 6))
        ax.imshow(rgb, origin="lower", extent=(-0.5, nx - 0.5, -0.5, ny - 0.5))
        ax.set_title(run_title(f"colour preview (R, G, B = {', '.join(used)})", None, seed))
        ax.set_xlabel("x (mosaic pixels)")
        ax.set_ylabel("y (mosaic pixels)")
        side = nx * pix
        bar = max(float(f"{side / 5:.0g}"), pix)  # a round ~1/5 of the field (arcsec)
        scale_bar(ax, bar / pix, f'{bar:g}"')
        compass(ax, north, east)
        figs.append(("Mosaic", _save(fig, out / "preview.png"),
                     "Three bands on an asinh stretch (bluest as blue, reddest as red), every "
                     "pixel a strided sample of the mosaic. Arrows: north and east from the "
                     "mosaic's WCS; bar: angular scale."))

    psfs = []
    for n in _band_order(run_dir):
        p = run_dir / f"psf_{n}.fits"
        if p.is_file():
            with fits.open(p) as hl:
                h = hl["PSF_WIDE"] if "PSF_WIDE" in hl else hl[1 if len(hl) > 1 else 0]
                psfs.append((n, np.asarray(h.data, float), h.header.get("PIXSCALE")))
    if psfs:
        fig, axes = plt.subplots(1, len(psfs), figsize=(2.8 * len(psfs), 3.1), squeeze=False)
        for ax, (n, img, sc) in zip(axes[0], psfs):
            v = np.log10(np.clip(img / img.max(), 1e-7, None))
            r = 0.5 * img.shape[1] * (sc or 1.0)
            ax.imshow(v, origin="lower", vmin=-7, vmax=0, cmap="magma", extent=(-r, r, -r, r))
            ax.set_title(run_title(n, None, seed) + (f"\n{sc:.4g}\"/pix" if sc else ""),
                         fontsize=8)
            unit = "arcsec" if sc else "pixels"
            ax.set_xlabel(f"x ({unit})", fontsize=8)
            ax.set_ylabel(f"y ({unit})", fontsize=8)
            ax.tick_params(labelsize=7)
            bar = float(f"{r / 2:.0g}")
            scale_bar(ax, bar, f"{bar:g}\"" if sc else f"{bar:g} pix")
            compass(ax, north, east, size=0.15)
        figs.append(("PSFs", _save(fig, out / "psf.png"),
                     "Wide PSF of each band on the mosaic's axes, log10 of PSF / peak from 1e-7 "
                     "(black) to 1 (white); arrows: north and east."))

    # ---- completeness (true magnitude) and purity (measured magnitude), one panel each
    cm, pm = tables["completeness_mag"], tables["purity_mag"]
    interval = str(cm.meta.get("interval", "intervals"))
    fig, (ac, ap) = plt.subplots(1, 2, figsize=(12, 5.4), sharey=True)
    for ax, t, col in ((ac, cm, "k"), (ap, pm, "tab:red")):
        ok = np.asarray(t["n"]) > 0
        x = np.asarray(t["mag_mid"])[ok]
        _plot_fraction(ax, x, t, ok, col, "per bin (k/n beside each point)")
        # upright: a label is then as wide as a line of text, less than a bin's width apart
        count_labels(ax, x, np.asarray(t["fraction"], float)[ok], np.asarray(t["k"])[ok],
                     np.asarray(t["n"])[ok], col, rotation=90)
        for lev in (0.5, 0.9):
            ax.axhline(lev, color="0.85", lw=0.8, zorder=0)
        ax.set_ylim(-0.02, 1.2)  # room above 1 for the upright k/n labels
        ax.set_yticks(np.linspace(0, 1, 6))
    mm = np.linspace(float(cm["mag_lo"][0]), float(cm["mag_hi"][-1]), 300)
    for model, ls in (("logistic", "-"), ("erf", "--")):
        f = fits_.get(model)
        if isinstance(f, metrics.CompletenessFit):
            ac.plot(mm, f(mm), ls, color="0.4" if f.describes_data else "0.75",
                    label=f"{model} fit (p = {f.p_value:.2g})")
    # the fit's m50 and m90 (and the purity's reference magnitude) as lines named in the
    # legends, which sit below the panels, off the data
    head = summary["headline_fit"]
    for key, ls in (("m50", ":"), ("m90", "-.")):
        v = summary.get(key)
        if v is not None:
            ac.axvline(v, color="tab:blue", ls=ls, lw=1.2,
                       label=f"{key} = {v:.2f} +/- {summary[key + '_err']:.2f} ({head} fit)")
        else:
            ac.plot([], [], ls="none", label=textwrap.fill(
                f"{key} not quoted ({head} fit): {summary.get(key + '_reason')}", 40))
    ref, pref = summary["reference_mag"], summary.get("purity_at_reference_mag")
    quoted = pref is not None and np.isfinite(pref)
    ap.axvline(ref, color="tab:blue", ls=":", lw=1.2, label=textwrap.fill(
        f"purity at {band} = {ref:g}: {pref:.3f}" if quoted else
        f"purity at {band} = {ref:g}: not quoted: no detections in that bin", 40))
    ac.set(xlabel=f"true observed {band} magnitude (AB mag)",
           ylabel="completeness (fraction of truth galaxies)",
           title=run_title("completeness against true magnitude", band, seed))
    ap.set(xlabel=f"measured {band} magnitude (catalogue, AB mag)",
           ylabel="purity (fraction of detections matched)",
           title=run_title("purity against measured magnitude", band, seed))
    ap.yaxis.set_tick_params(labelleft=True)
    from matplotlib.transforms import offset_copy

    for ax in (ac, ap):
        # 40 points below the axes: under the tick labels and the x label; two columns of
        # at most 40 characters fit the axes' width
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, 0.0), ncol=2, fontsize=7,
                  bbox_transform=offset_copy(ax.transAxes, fig=fig, y=-40, units="points"))
    figs.append(("Completeness and purity", _save(fig, out / "completeness_purity.png"),
                 "Left: fraction of the truth galaxies recovered, per bin of true observed "
                 "magnitude; right: fraction of the detections matched to a truth image, per bin "
                 "of measured magnitude. Labels k/n: recovered (matched) of all in the bin; "
                 f"bars: {interval}. Blue lines: m50 and m90 of the headline fit and the "
                 "reference magnitude of the purity; fits in light grey fail the goodness-of-fit "
                 "test."))

    fig, axes = plt.subplots(1, 3, figsize=(12, 3.6))
    for ax, (key, col, lab, logx, what) in zip(axes, (
            ("completeness_size", "r_half", "observed r_half (arcsec)", True, "size"),
            ("completeness_z", "z", "true redshift z", False, "redshift"),
            ("completeness_mu", "mu", "magnification |mu|", True, "magnification"))):
        t = tables[key]
        ok = np.asarray(t["n"]) > 0
        lo, hi = np.asarray(t[f"{col}_lo"])[ok], np.asarray(t[f"{col}_hi"])[ok]
        x = np.sqrt(np.clip(lo, 1e-3, None) * hi) if logx else 0.5 * (lo + hi)
        _plot_fraction(ax, x, t, ok, "k", None)
        count_labels(ax, x, np.asarray(t["fraction"], float)[ok], np.asarray(t["k"])[ok],
                     np.asarray(t["n"])[ok])
        if logx:
            ax.set_xscale("log")
        ax.set(xlabel=lab, ylabel="completeness (fraction)", ylim=(-0.02, 1.12),
               title=run_title(f"against {what}", band, seed))
    figs.append(("Completeness against size, redshift and magnification",
                 _save(fig, out / "completeness_other.png"),
                 "Fraction of the truth galaxies recovered per bin, all magnitudes together; "
                 f"labels k/n as above, bars: {interval}."))

    ph = tables["photometry"]
    ok = np.asarray(ph["n"]) > 0
    measure = _flux_measure(det)
    fig, ax = plt.subplots(figsize=(7, 3.6))
    xm, ym = np.asarray(ph["mag_mid"])[ok], np.asarray(ph["median"])[ok]
    ax.errorbar(xm, ym, yerr=np.asarray(ph["nmad"])[ok], fmt="o", ms=3, capsize=2)
    for xi, yi, ni in zip(xm, ym, np.asarray(ph["n"])[ok]):
        ax.annotate(f"{int(ni)}", (xi, yi), fontsize=6, xytext=(2, 3),
                    textcoords="offset points", gid="count")
    ax.axhline(0, color="0.7")
    ax.set(xlabel=f"true observed {band} magnitude (AB mag)",
           ylabel="measured - true (mag)",
           title=run_title("photometric bias", band, seed) + "\n"
           + textwrap.fill(f"measured: {measure}", 70))  # each line within the figure
    figs.append(("Photometry", _save(fig, out / "photometry.png"),
                 f"Measured magnitude: {measure}. Points: median of measured - true per bin of "
                 "true magnitude over the matched detections; bars: 1.4826 x MAD; numbers: "
                 "matches per bin."))

    ft = tables["false_detections"]
    counts = summary["false_detections"]
    fig, ax = plt.subplots(figsize=(6, 3.4))
    names = list(metrics.FALSE_CAUSES)
    bars = ax.bar(names, [counts[n] for n in names], color=[_CAUSE_COLOURS[n] for n in names])
    ax.bar_label(bars, fontsize=8, gid="count")
    ax.set_ylim(0, 1.15 * max(1, max(counts.values())))
    # slanted: the names of the causes are longer than their bars are apart
    ax.tick_params(axis="x", labelrotation=30)
    for t in ax.get_xticklabels():
        t.set(ha="right", rotation_mode="anchor")
    ax.set(xlabel="cause of the false detection", ylabel="unmatched detections (count)",
           title=run_title(f"false detections by cause ({sum(counts.values())} of "
                           f"{summary['n_detections']})", band, seed))
    figs.append(("False detections by cause", _save(fig, out / "false_causes.png"),
                 "Detections without a truth match, by the cause the scoring assigns "
                 "(artefact: on a detector artefact the truth knows; spike: on a bright star's diffraction spike; "
                 "shred: a piece of a matched source; blend: between sources; persistence: "
                 "on a persistence ghost of an earlier exposure; stripe: on a 1/f read-noise "
                 "stripe the reference pixels left; noise: the rest); the number of each on "
                 "its bar."))

    sci = truth["sci"]
    ex = [(n, np.flatnonzero(np.asarray(ft["cause"]) == n)[:4]) for n in names]
    ex = [(n, i) for n, i in ex if i.size]
    if ex:
        ncol = max(i.size for _, i in ex)
        fig, axes = plt.subplots(len(ex), ncol, figsize=(2.2 * ncol, 2.4 * len(ex)),
                                 squeeze=False)
        half = int(round(1.5 / pix))
        # display levels from a strided sample of ~1 Mpix of the memory-mapped mosaic
        step = _sample_step(sci.shape, 1e6)
        samp = np.asarray(sci[::step, ::step], float)
        samp = samp[np.isfinite(samp)]
        med = np.median(samp) if samp.size else 0.0
        mad = 1.4826 * np.median(np.abs(samp - med)) if samp.size else 1.0
        r = (half + 0.5) * pix
        for row, (n, idx) in enumerate(ex):
            for c in range(ncol):
                ax = axes[row, c]
                if c >= idx.size:
                    ax.axis("off")
                    continue
                i = idx[c]
                cut = _padded_cut(sci, float(ft["x"][i]), float(ft["y"][i]), half)
                ax.imshow(_stretch(np.nan_to_num(cut, nan=med), med - 2 * mad, med + 100 * mad),
                          origin="lower", cmap="gray", extent=(-r, r, -r, r))
                ax.plot(0, 0, "+", color=_CAUSE_COLOURS[n], ms=10)
                mag = float(ft["mag"][i])
                ax.set_title(f"{n}: row {int(ft['row'][i])}\n{band} = {mag:.2f}", fontsize=7)
                ax.set_xlabel("x (arcsec)", fontsize=7)
                ax.set_ylabel("y (arcsec)", fontsize=7)
                ax.tick_params(labelsize=6)
                scale_bar(ax, 1.0, '1"')
                compass(ax, north, east, size=0.15)
        fig.suptitle(run_title("false detections", band, seed), fontsize=9)
        figs.append(("Examples of false detections", _save(fig, out / "false_examples.png"),
                     "Up to four per cause: 3\" cut-outs of the mosaic (asinh stretch, padded "
                     "with the median at the mosaic's edges so every cut-out has one size), the "
                     "cross at the detection; titles: cause, catalogue row and measured "
                     "magnitude; arrows: north and east."))

    rows = [("scenario", sentence), *id_rows, ("band", band), ("catalogue", summary["catalog"]),
            ("match radius (arcsec)", f"{summary['match_radius_arcsec']:.3g}"),
            ("truth galaxies on the mosaic", summary["n_truth_galaxies"]),
            ("detections", summary["n_detections"]), ("matched", summary["n_matched"])]
    for k, lab in (("completeness_all", "completeness (all magnitudes)"),
                   ("purity_all", "purity (all detections)"),
                   ("purity_at_reference_mag", f"purity at mag {summary['reference_mag']}")):
        v = summary.get(k)
        rows.append((lab, "n/a" if v is None else f"{v:.3f}"))
    for k in ("m50", "m90"):
        v = summary.get(k)
        rows.append((f"{k} ({summary['headline_fit']} fit, AB)",
                     f"{v:.2f} +/- {summary[k + '_err']:.2f}" if v is not None else
                     f"not quoted: {summary.get(k + '_reason')}"))
    rows.append(("false detections", ", ".join(f"{k}: {v}" for k, v in counts.items())))
    return write_page(out / "report.html", f"simfield score: {band}",
                      f"simfield score, band {band}", rows, figs)


def _flux_measure(det) -> str:
    """Which catalogue column the measured magnitudes come from, in words."""
    cols = det.meta.get("columns") or {}
    col = cols.get("flux") or cols.get("mag") if isinstance(cols, dict) else None
    src = Path(str(det.meta.get("source", "")))
    if src.name.startswith("detections_") and (col in (None, "mag")):
        return "the Kron-aperture magnitude (detections 'mag')"
    return f"catalogue column '{col or 'mag'}'"


def _padded_cut(img, x: float, y: float, half: int) -> np.ndarray:
    """The (2 half + 1)^2-pixel cut-out of ``img`` centred on pixel (x, y), NaN beyond the
    image's edges (so cut-outs at the edges keep their size)."""
    x0, y0 = int(round(x)), int(round(y))
    ny, nx = img.shape
    cut = np.full((2 * half + 1, 2 * half + 1), np.nan)
    ya, yb = max(0, y0 - half), min(ny, y0 + half + 1)
    xa, xb = max(0, x0 - half), min(nx, x0 + half + 1)
    if ya < yb and xa < xb:
        cut[ya - (y0 - half):yb - (y0 - half), xa - (x0 - half):xb - (x0 - half)] = \
            np.asarray(img[ya:yb, xa:xb], float)
    return cut


def write_page(path, title: str, heading: str, rows, figs) -> Path:
    """A self-contained HTML page: a header table of (label, value) ``rows``, a table of
    contents, and the ``figs`` (title, base64 PNG, caption), each under its own anchor, written
    atomically to ``path``. A row labelled ``"scenario"`` opens the page as a sentence."""
    from ..io import write_text

    rows = list(rows)
    lead = "".join(f"<p class=\"lead\">{html.escape(str(b))}</p>" for a, b in rows
                   if a == "scenario")
    table = "\n".join(f"<tr><th>{html.escape(str(a))}</th><td>{html.escape(str(b))}</td></tr>"
                      for a, b in rows if a != "scenario")
    toc = "\n".join(f"<li><a href=\"#fig{i}\">{html.escape(t)}</a></li>"
                    for i, (t, _, _) in enumerate(figs))
    body = "\n".join(
        f"<h2 id=\"fig{i}\">{html.escape(t)}</h2>\n<img src=\"data:image/png;base64,{b64}\" "
        f"alt=\"{html.escape(t)}\">\n<p class=\"cap\">{html.escape(cap)}</p>"
        for i, (t, b64, cap) in enumerate(figs))
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}}
table{{border-collapse:collapse}}th,td{{padding:3px 10px;border-bottom:1px solid #ddd;
text-align:left}}img{{max-width:100%}}.cap{{color:#444;font-size:90%}}
.lead{{font-size:110%}}</style></head>
<body><h1>{html.escape(heading)}</h1>
<header>{lead}
<table>{table}</table></header>
<nav><h2>Contents</h2><ol class="toc">
{toc}
</ol></nav>
{body}
</body></html>
"""
    write_text(Path(path), page)
    return Path(path)
