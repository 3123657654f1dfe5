"""Self-contained HTML report of a scoring run, with its PNG plots beside it.

Sections: headline numbers, colour preview of the mosaic (three bands), PSF images, completeness
and purity curves with their intervals and fits, completeness against size, redshift and
magnification, photometric bias, and the breakdown of false detections with example cut-outs.
Images are embedded as base64 PNG so the page needs no other file.
"""

from __future__ import annotations

import base64
import html
import io as _io
from pathlib import Path

import numpy as np

from . import metrics

__all__ = ["make_report"]

_CAUSE_COLOURS = {"artefact": "#7f7f7f", "spike": "#d62728", "shred": "#ff7f0e",
                  "blend": "#9467bd", "noise": "#1f77b4"}


def _save(fig, path: Path) -> str:
    from ..io import atomic_path

    buf = _io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    data = buf.getvalue()
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return base64.b64encode(data).decode("ascii")


def _stretch(img, lo, hi):
    # asinh stretch between the given levels (common practice for deep-field previews)
    x = np.clip((img - lo) / max(hi - lo, 1e-30), 0, None)
    return np.clip(np.arcsinh(10 * x) / np.arcsinh(10), 0, 1)


def _plot_fraction(ax, x, t, ok, colour, label):
    """Fractions with their interval as error bars from ``fraction_lo`` to ``fraction_hi``
    (the Jeffreys interval holds k/n, so the bars reach the point, e.g. up to 1 at k = n)."""
    f = np.asarray(t["fraction"], float)[ok]
    lo, hi = np.asarray(t["fraction_lo"], float)[ok], np.asarray(t["fraction_hi"], float)[ok]
    return ax.errorbar(x, f, yerr=[f - lo, hi - f], fmt="o", ms=3, color=colour, elinewidth=1.2,
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

    out = Path(out_dir)
    run_dir = Path(truth["run_dir"])
    figs = []  # (title, base64, caption)

    rgb, used = _colour_preview(run_dir)
    if rgb is not None:
        fig, ax = plt.subplots(figsize=(6, 6))
        ax.imshow(rgb, origin="lower")
        ax.set_title(f"colour preview (R, G, B = {', '.join(used)})")
        ax.set_xticks([])
        ax.set_yticks([])
        figs.append(("Mosaic", _save(fig, out / "preview.png"),
                     "asinh stretch; north up, east left for roll 0"))

    psfs = []
    for n in _band_order(run_dir):
        p = run_dir / f"psf_{n}.fits"
        if p.is_file():
            with fits.open(p) as hl:
                h = hl["PSF_WIDE"] if "PSF_WIDE" in hl else hl[1 if len(hl) > 1 else 0]
                psfs.append((n, np.asarray(h.data, float), h.header.get("PIXSCALE")))
    if psfs:
        fig, axes = plt.subplots(1, len(psfs), figsize=(2.6 * len(psfs), 2.8), squeeze=False)
        for ax, (n, img, sc) in zip(axes[0], psfs):
            v = np.log10(np.clip(img / img.max(), 1e-7, None))
            ax.imshow(v, origin="lower", vmin=-7, vmax=0, cmap="magma")
            ax.set_title(f"{n}" + (f" ({sc:.4g}\"/pix)" if sc else ""), fontsize=9)
            ax.set_xticks([])
            ax.set_yticks([])
        figs.append(("PSFs", _save(fig, out / "psf.png"), "log10 of PSF / peak, 1e-7 .. 1"))

    # completeness and purity vs magnitude
    cm, pm = tables["completeness_mag"], tables["purity_mag"]
    fig, ax = plt.subplots(figsize=(7, 4.2))
    for t, lab, col in ((cm, "completeness (true observed mag)", "k"),
                        (pm, "purity (measured mag)", "tab:red")):
        ok = np.asarray(t["n"]) > 0
        x = np.asarray(t["mag_mid"])[ok]
        _plot_fraction(ax, x, t, ok, col, lab)
    mm = np.linspace(float(cm["mag_lo"][0]), float(cm["mag_hi"][-1]), 300)
    for model, ls in (("logistic", "-"), ("erf", "--")):
        f = fits_.get(model)
        if isinstance(f, metrics.CompletenessFit):
            quote = (f"m50 = {f.m50:.2f} +/- {f.m50_err:.2f}" if f.m50_reason is None else
                     "m50 not quoted")
            ax.plot(mm, f(mm), ls, color="0.4" if f.describes_data else "0.75",
                    label=f"{model} fit (p = {f.p_value:.2g}): {quote}")
    ax.axhline(0.5, color="0.8", lw=0.8)
    ax.axhline(0.9, color="0.8", lw=0.8)
    ax.set_xlabel(f"{band} AB magnitude")
    ax.set_ylabel("fraction")
    ax.set_ylim(-0.02, 1.05)
    ax.legend(fontsize=8, loc="lower left")
    figs.append(("Completeness and purity", _save(fig, out / "completeness_purity.png"),
                 "bars: " + str(cm.meta.get("interval", "")) + "; fits in light grey fail "
                 "the goodness-of-fit test"))

    fig, axes = plt.subplots(1, 3, figsize=(11, 3.2))
    for ax, (key, col, lab, logx) in zip(axes, (
            ("completeness_size", "r_half", "observed r_half (arcsec)", True),
            ("completeness_z", "z", "redshift", False),
            ("completeness_mu", "mu", "magnification |mu|", True))):
        t = tables[key]
        ok = np.asarray(t["n"]) > 0
        lo, hi = np.asarray(t[f"{col}_lo"])[ok], np.asarray(t[f"{col}_hi"])[ok]
        x = np.sqrt(np.clip(lo, 1e-3, None) * hi) if logx else 0.5 * (lo + hi)
        _plot_fraction(ax, x, t, ok, "k", None)
        if logx:
            ax.set_xscale("log")
        ax.set_xlabel(lab)
        ax.set_ylim(-0.02, 1.05)
    axes[0].set_ylabel("completeness")
    figs.append(("Completeness against size, redshift and magnification",
                 _save(fig, out / "completeness_other.png"), "all magnitudes together"))

    ph = tables["photometry"]
    ok = np.asarray(ph["n"]) > 0
    fig, ax = plt.subplots(figsize=(7, 3.2))
    ax.errorbar(np.asarray(ph["mag_mid"])[ok], np.asarray(ph["median"])[ok],
                yerr=np.asarray(ph["nmad"])[ok], fmt="o", ms=3, capsize=2)
    ax.axhline(0, color="0.7")
    ax.set_xlabel("true observed magnitude")
    ax.set_ylabel("measured - true (mag)")
    figs.append(("Photometry", _save(fig, out / "photometry.png"),
                 "median and 1.4826 x MAD per bin"))

    ft = tables["false_detections"]
    counts = summary["false_detections"]
    fig, ax = plt.subplots(figsize=(6, 3))
    names = list(metrics.FALSE_CAUSES)
    ax.bar(names, [counts[n] for n in names], color=[_CAUSE_COLOURS[n] for n in names])
    ax.set_ylabel("unmatched detections")
    figs.append(("False detections by cause", _save(fig, out / "false_causes.png"), ""))

    sci = truth["sci"]
    ex = [(n, np.flatnonzero(np.asarray(ft["cause"]) == n)[:4]) for n in names]
    ex = [(n, i) for n, i in ex if i.size]
    if ex:
        ncol = max(i.size for _, i in ex)
        fig, axes = plt.subplots(len(ex), ncol, figsize=(1.8 * ncol, 1.9 * len(ex)),
                                 squeeze=False)
        half = int(round(1.5 / truth["pixel_scale"]))
        # display levels from a strided sample of ~1 Mpix of the memory-mapped mosaic
        step = _sample_step(sci.shape, 1e6)
        samp = np.asarray(sci[::step, ::step], float)
        samp = samp[np.isfinite(samp)]
        med = np.median(samp) if samp.size else 0.0
        mad = 1.4826 * np.median(np.abs(samp - med)) if samp.size else 1.0
        for r, (n, idx) in enumerate(ex):
            for c in range(ncol):
                ax = axes[r, c]
                ax.set_xticks([])
                ax.set_yticks([])
                if c >= idx.size:
                    ax.axis("off")
                    continue
                x0, y0 = int(round(ft["x"][idx[c]])), int(round(ft["y"][idx[c]]))
                cut = np.asarray(sci[max(0, y0 - half):y0 + half + 1,
                                     max(0, x0 - half):x0 + half + 1], float)
                ax.imshow(_stretch(cut, med - 2 * mad, med + 100 * mad), origin="lower",
                          cmap="gray")
                ax.plot(min(half, x0), min(half, y0), "+", color=_CAUSE_COLOURS[n], ms=10)
                if c == 0:
                    ax.set_ylabel(n)
        figs.append(("Examples of false detections", _save(fig, out / "false_examples.png"),
                     "3 arcsec cut-outs of the mosaic, cross at the detection"))

    rows = [("band", band), ("catalogue", summary["catalog"]),
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


def write_page(path, title: str, heading: str, rows, figs) -> Path:
    """A self-contained HTML page: a table of (label, value) ``rows`` and the ``figs``
    (title, base64 PNG, caption), written atomically to ``path``."""
    from ..io import write_text

    table = "\n".join(f"<tr><th>{html.escape(str(a))}</th><td>{html.escape(str(b))}</td></tr>"
                      for a, b in rows)
    body = "\n".join(
        f"<h2>{html.escape(t)}</h2>\n<img src=\"data:image/png;base64,{b64}\" "
        f"alt=\"{html.escape(t)}\">\n<p class=\"cap\">{html.escape(cap)}</p>"
        for t, b64, cap in figs)
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}}
table{{border-collapse:collapse}}th,td{{padding:3px 10px;border-bottom:1px solid #ddd;
text-align:left}}img{{max-width:100%}}.cap{{color:#666;font-size:90%}}</style></head>
<body><h1>{html.escape(heading)}</h1>
<table>{table}</table>
{body}
</body></html>
"""
    write_text(Path(path), page)
    return Path(path)
