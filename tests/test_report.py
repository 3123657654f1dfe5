"""Figures and report pages of a small run, checked by inspecting the matplotlib artists of the
real figures (axes labels, titles, count annotations, scale bars, compasses) and the HTML."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from simfield.config import ConditionConfig, SampleConfig
from simfield.pipeline import run_scenario
from tests.conftest import shared_psf_cache
from tests.test_pipeline import small_scenario


def _texts(fig, gid):
    return [a for ax in fig.axes for a in ax.get_children() if getattr(a, "get_gid", None)
            and a.get_gid() == gid]


@pytest.fixture(scope="module")
def figures(tmp_path_factory):
    """Every figure the score and selection reports save, captured at ``_save``."""
    import simfield.score.report as sr
    import simfield.selection.report as selr

    from matplotlib.figure import Figure

    saved = {}
    mp = pytest.MonkeyPatch()
    orig_savefig = Figure.savefig

    def savefig(fig, fname, *a, **k):  # the cached PSF picture is saved straight from Figure
        if "psf_picture" in str(fname):
            saved["optics/psf_picture.png"] = fig
        return orig_savefig(fig, fname, *a, **k)

    mp.setattr(Figure, "savefig", savefig)
    for mod in (sr, selr):
        orig = mod._save

        def keep(fig, path, _orig=orig):
            saved[str(path)] = fig
            return _orig(fig, path)

        mp.setattr(mod, "_save", keep)
    tmp = tmp_path_factory.mktemp("report")
    # its own PSF cache: the PSF picture is drawn (and captured) only when not cached yet; the
    # band PSFs other tests already computed into the session's cache are copied in (whole
    # files, written atomically there), not computed again
    cache = tmp / "psf_cache"
    cache.mkdir()
    for f in Path(shared_psf_cache()).glob("psf_b[12]3_*.npz"):
        shutil.copyfile(f, cache / f.name)
    assert not list(cache.glob("psf_picture*"))
    sc = small_scenario(tmp, "score.report=true", "selection.report=true",
                        f"telescope.psf.cache_dir={tmp / 'psf_cache'}")
    sc.selection.samples = [SampleConfig(  # two bands: an S/N sample, no colour diagram
        "bright", 0.0, 15.0, [ConditionConfig(kind="snr", bands=["b23"], above=3.0)])]
    # one process: with several workers the scoring runs in a process of its own, where the
    # figures it saves could not be captured here
    sc.workers = 1
    try:
        res = run_scenario(sc, tmp / "run")
    finally:
        mp.undo()
    return res.out_dir, saved


def _named(saved, name):
    return [f for p, f in saved.items() if p.endswith("/" + name)]


def test_every_axes_has_labels_and_title(figures):
    """Every visible axes of every report figure (and the run's PSF picture) has x and y labels
    and a title naming the seed (its own or the figure's); panels stacked on one shared x axis
    (S(z) over its n per cell) are one plot: the x label of one, the title of one."""
    _, saved = figures
    assert {"psf_picture.png", "completeness_purity.png", "completeness_z.png"} <= \
        {p.rsplit("/", 1)[-1] for p in saved}
    for path, fig in saved.items():
        for ax in fig.axes:
            if not ax.get_visible() or not ax.axison or ax.get_label() == "<colorbar>":
                continue
            group = ax.get_shared_x_axes().get_siblings(ax)
            assert any(a.get_xlabel() for a in group), (path, "x label")
            assert ax.get_ylabel(), (path, "y label")
            title = next((a.get_title() for a in group if a.get_title()), "")
            assert title, (path, "title")
            assert "seed" in title or "seed" in (fig._suptitle.get_text() if
                                                 fig._suptitle else ""), path


def test_fraction_plots_carry_counts(figures):
    """Completeness and purity panels write k/n beside their points; bar charts their counts."""
    _, saved = figures
    for name in ("completeness_purity.png", "completeness_other.png", "false_causes.png"):
        (fig,) = _named(saved, name)
        for ax in fig.axes:
            counts = [a for a in ax.get_children() if getattr(a, "get_gid", None)
                      and a.get_gid() == "count"]
            assert counts, (name, ax.get_title())
    (fig,) = _named(saved, "completeness_purity.png")
    assert re.fullmatch(r"\d+/\d+", _texts(fig, "count")[0].get_text())
    text = " ".join(t.get_text() for ax in fig.axes
                    for t in [*ax.texts, *ax.get_legend().get_texts()])
    assert "m50" in text and "m90" in text and "purity at" in text


def test_sky_images_have_scale_bar_and_compass(figures):
    """Preview, PSF panels and false-detection cut-outs carry a scale bar and N/E arrows."""
    _, saved = figures
    for name in ("preview.png", "psf.png", "false_examples.png", "psf_picture.png"):
        for fig in _named(saved, name):
            for ax in fig.axes:
                if not ax.images or ax.get_xlabel().endswith("(m)"):
                    continue  # the pupil and wavefront panels are not on the sky
                assert _texts(fig, "scale_bar") and [a for a in ax.get_children() if
                                                     getattr(a, "get_gid", None) and
                                                     a.get_gid() == "scale_bar"], name
                labels = {a.get_text() for a in ax.texts if a.get_gid() == "compass"}
                assert labels >= {"N", "E"}, name


def test_compass_points_north_and_east_from_the_wcs(figures):
    """The preview's N arrow points to +y and E to -x for roll 0 (astropy WCS of the mosaic)."""
    out, saved = figures
    (fig,) = _named(saved, "preview.png")
    ax = fig.axes[0]
    arrows = [a for a in ax.texts if a.get_gid() == "compass" and a.get_text() == ""]
    vecs = [np.subtract(a.xy, a.xyann) for a in arrows]
    from astropy.wcs import WCS

    w = WCS(fits.getheader(next(out.glob("mosaic_*.fits")), "IMAGE"))
    assert w.wcs.get_pc()[0, 0] < 0  # RA grows to -x: east left on this mosaic
    assert vecs[0][1] > 0 and abs(vecs[0][0]) < 1e-6  # N up
    assert vecs[1][0] < 0 and abs(vecs[1][1]) < 1e-6  # E left


def test_report_page_has_header_and_contents(figures):
    """The score page opens with the scenario, version, seed, hash and depth, then contents."""
    out, _ = figures
    page = next((out / "score").glob("*/report.html")).read_text()
    hdr = fits.getheader(next(out.glob("mosaic_*.fits")), 0)
    for field in ("simfield version", "seed", "configuration hash", "measured depth"):
        assert field in page, field
    assert str(hdr["SIMFHASH"]) in page and str(hdr["SIMFVER"]).strip() in page
    assert "n/a" not in page.split("measured depth")[1][:80]
    assert 'class="toc"' in page and page.count('href="#fig') >= 5
    assert page.index("Contents") < page.index("<img")
    for cap in re.findall(r'<p class="cap">(.*?)</p>', page):
        assert cap.strip()


def test_psf_picture_states_the_wavefront_rms(figures):
    """The wavefront panel states the rms of the scenario's drawn wavefront error (the default
    telescope has one), recomputed here from the pupil the seed gives."""
    from simfield.optics import scenario_pupil

    out, saved = figures
    titles = [ax.get_title() for ax in saved["optics/psf_picture.png"].axes]
    sc = small_scenario(out)
    rms = scenario_pupil(sc.telescope, sc.seed, grid_size=512).rms_wfe_nm
    assert rms > 50
    assert any("wavefront" in t and f"rms {rms:.1f} nm" in t for t in titles), titles


def test_selection_page_has_header_and_faint_small_cells(figures):
    """The selection page has the run's header; S(z) draws error bars only for n >= 3 cells,
    labels every cell k/n while a line has few enough cells to read them (faint where n < 3),
    and its lower panel gives each line's n per cell as completeness.ecsv has it."""
    out, saved = figures
    page = next((out / "selection").glob("*/report.html")).read_text()
    hdr = fits.getheader(next(out.glob("mosaic_*.fits")), 0)
    assert str(hdr["SIMFHASH"]) in page and "measured depths" in page and 'class="toc"' in page
    from astropy.table import Table

    from simfield.selection.report import _MAX_LABELLED_CELLS

    paths = [p for p in saved if p.endswith("completeness_z.png")]
    assert paths
    for path in paths:
        comp = Table.read(Path(path).with_name("completeness.ecsv"))
        fig = saved[path]
        ax, axn = fig.axes[:2]
        stairs = [p for p in axn.patches if p.get_gid() == "n_cells"]
        assert 1 <= len(stairs) <= 4
        lo = np.asarray(comp["abs_mag_uv_lo"], float)
        for st in stairs:  # each line's n per cell, one M_UV bin of the table each
            vals = np.asarray(st.get_data().values)
            assert any(np.array_equal(vals, np.asarray(comp["n"])[lo == m])
                       for m in np.unique(lo)), vals
        cells = max(int(np.sum(np.asarray(st.get_data().values) > 0)) for st in stairs)
        labels = [a for a in ax.texts if a.get_gid() == "count"]
        assert bool(labels) == (cells <= _MAX_LABELLED_CELLS), (cells, len(labels))
        assert all(re.fullmatch(r"\d+/\d+", a.get_text()) for a in labels)
        for a in labels:
            k, n = (int(v) for v in a.get_text().split("/"))
            assert (a.get_alpha() or 1.0) == (1.0 if n >= 3 else 0.5)
        bars = sum(len(seg.get_segments()) for c in ax.collections
                   for seg in [c] if hasattr(c, "get_segments"))
        assert bars <= int(np.sum(np.asarray(comp["n"]) >= 3))


def test_lens_picture(tmp_path):
    """lens.png of a small lens: labels, title, field outline (the field, not the map, with
    the map's margin outlined apart), halo centre, kpc scale, plain colour-bar ticks (kpc per
    arcsec from astropy.cosmology, not the project's own), the legend off the map."""
    from astropy.cosmology import FlatLambdaCDM

    from simfield.lensing import write_lens_png
    from simfield.lensing.profiles import SIE
    from simfield.lensing.raytrace import Lens

    cosmo = FlatLambdaCDM(H0=70, Om0=0.3, Tcmb0=2.725)
    lens = Lens(0.4, (SIE(0.0, 0.0, 3.0, 0.7, 20.0),), cosmo)
    fig = write_lens_png(lens, tmp_path / "lens.png", 20.0, 0.1, seed=7,
                         field_arcsec=(-8.0, 8.0, -8.0, 8.0))
    ax = fig.axes[0]
    assert ax.get_xlabel() and ax.get_ylabel() and "seed 7" in ax.get_title()
    labels = ax.get_legend_handles_labels()[1]
    assert "field (mosaic)" in labels and "halo centre" in labels
    assert 'field + 2" margin (sources drawn)' in labels
    boxes = {p.get_gid(): p.get_bbox().extents for p in ax.patches}
    np.testing.assert_allclose(boxes["field"], [-8, -8, 8, 8])
    np.testing.assert_allclose(boxes["margin"], [-10, -10, 10, 10])
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    (legend,) = fig.legends
    r = FigureCanvasAgg(fig).get_renderer()  # the figure is closed: a canvas to measure on
    assert not legend.get_window_extent(r).overlaps(ax.get_window_extent(r))
    (bar,) = [a for a in ax.get_children() if getattr(a, "get_gid", None)
              and a.get_gid() == "scale_bar"]
    kpc = cosmo.kpc_proper_per_arcmin(0.4).value / 60 * 4  # the 4" bar of a 20" field
    text = bar.txt_label.get_text() if hasattr(bar, "txt_label") else ""
    assert f"{kpc:.0f} kpc" in text, text
    ticks = [t.get_text() for t in fig.axes[1].get_yticklabels()]
    assert ticks and not any("times" in t or "^" in t for t in ticks), ticks


def test_intervals_contain_their_points(figures):
    """Every error bar of the completeness and purity panels spans its point (k = n included),
    read back from the drawn line collections."""
    _, saved = figures
    (fig,) = _named(saved, "completeness_purity.png")
    checked = 0
    for ax in fig.axes:
        for cont in ax.containers:
            data_line, _, barcols = cont.lines
            bars = barcols[0]
            x, y = data_line.get_data()
            for (xi, yi), seg in zip(zip(x, y), bars.get_segments()):
                lo, hi = sorted(seg[:, 1])
                assert lo - 1e-12 <= yi <= hi + 1e-12 and abs(seg[0, 0] - xi) < 1e-9
                checked += 1
    assert checked > 0


def _renderer(fig):
    """A renderer of ``fig`` as saved (the report closes its figures after laying them out)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    return FigureCanvasAgg(fig).get_renderer()


def _inside(bb, fig, tol=0.5):
    """Whether the window extent ``bb`` lies within the figure (``tol`` pixels)."""
    f = fig.bbox
    return (bb.x0 >= f.x0 - tol and bb.y0 >= f.y0 - tol and bb.x1 <= f.x1 + tol
            and bb.y1 <= f.y1 + tol)


def _overlapping(extents, gap=0.0):
    """Pairs (i, j) of window extents closer than ``gap`` pixels (overlapping: gap 0)."""
    return [(i, j) for i, a in enumerate(extents) for j, b in enumerate(extents[:i])
            if min(a.x1, b.x1) - max(a.x0, b.x0) > -gap
            and min(a.y1, b.y1) - max(a.y0, b.y0) > -gap]


def test_titles_and_axis_labels_stay_inside_the_figure(figures):
    """Every report figure's titles, axis labels and tick labels lie inside the saved figure
    (a title longer than its figure, e.g. photometry.png's, or a bottom row's x label were
    cut off at the edge)."""
    _, saved = figures
    outside = []
    for path, fig in saved.items():
        if path.startswith("optics/"):
            continue  # the PSF picture is the optics' own, not a report's
        r = _renderer(fig)
        boxes = [("suptitle", fig._suptitle.get_window_extent(r))] if fig._suptitle else []
        for ax in fig.axes:
            if ax.get_visible() and ax.axison:
                # each axis: its drawn tick labels and its label
                boxes += [(ax.get_title(), ax.title.get_window_extent(r)),
                          (ax.get_xlabel(), ax.xaxis.get_tightbbox(r)),
                          (ax.get_ylabel(), ax.yaxis.get_tightbbox(r))]
        outside += [(path.rsplit("/", 1)[-1], what, b.extents.round()) for what, b in boxes
                    if b is not None and not _inside(b, fig)]
    assert not outside


def test_false_examples_fit_the_figure(figures, tmp_path, monkeypatch):
    """The cut-outs of false_examples.png lie inside the figure with their labels (the bottom
    row's x labels were cut off) and clear of each other (a row's x labels ran into the titles
    of the row below). The run's own detections and a few made-up ones away from every truth
    image, scored by simfield-score, make the false detections."""
    import simfield.score.report as sr
    from astropy.table import Table, vstack

    from simfield.score.run import score_main_args

    out, _ = figures
    band = "b23"
    own = Table.read(out / f"detections_{band}.fits", hdu="DETECTIONS")["ra", "dec", "mag"]
    img = Table.read(out / "truth.fits", hdu="IMAGES")
    ra0, dec0 = np.median(own["ra"]), np.median(own["dec"])
    fake = []
    for dx in np.linspace(-3.0, 3.0, 9):  # arcsec
        for dy in np.linspace(-3.0, 3.0, 9):
            ra, dec = ra0 + dx / 3600 / np.cos(np.deg2rad(dec0)), dec0 + dy / 3600
            sep = np.hypot((img["ra"] - ra) * np.cos(np.deg2rad(dec0)), img["dec"] - dec)
            if sep.min() * 3600 > 0.5 and len(fake) < 4:
                fake.append((ra, dec, 27.0))
    assert len(fake) == 4
    cat = vstack([own, Table(rows=fake, names=("ra", "dec", "mag"))])
    cat.write(tmp_path / "cat.ecsv")
    saved = {}
    orig = sr._save
    monkeypatch.setattr(sr, "_save", lambda fig, path: saved.setdefault(Path(path).name, fig)
                        and orig(fig, path))
    assert score_main_args([str(out), "--catalog", str(tmp_path / "cat.ecsv"), "--band", band,
                            "--allow-flux-offset", "--out", str(tmp_path / "s")]) == 0
    fig = saved["false_examples.png"]
    r = _renderer(fig)
    boxes = [ax.get_tightbbox(r) for ax in fig.axes if ax.axison]
    assert len(boxes) >= 4 and not _overlapping(boxes)
    assert all(_inside(b, fig) for b in boxes)


def test_false_cause_names_do_not_overlap(figures):
    """false_causes.png: the cause names under the bars are clear of each other ("artefact"
    and "persistence" ran together): their boxes apart by 2 pixels, or, slanted alike, the
    bands of their lines of text apart by 2 pixels across the slant."""
    _, saved = figures
    (fig,) = _named(saved, "false_causes.png")
    r = _renderer(fig)
    ticks = [t for t in fig.axes[0].get_xticklabels() if t.get_text()]
    assert len(ticks) >= 7
    for a, b in zip(ticks, ticks[1:]):
        if not _overlapping([a.get_window_extent(r), b.get_window_extent(r)], gap=2.0):
            continue
        angle = np.deg2rad(a.get_rotation())
        assert angle != 0 and b.get_rotation() == a.get_rotation(), (a, b)
        pa, pb = (t.get_transform().transform(t.get_unitless_position()) for t in (a, b))
        across = abs(np.dot(pb - pa, [-np.sin(angle), np.cos(angle)]))
        line = a.get_fontsize() * fig.dpi / 72 * 1.2  # a line of text (pixels)
        assert across >= line + 2, (a.get_text(), b.get_text(), across, line)


def test_completeness_labels_and_boxes_leave_the_data_clear(figures):
    """completeness_purity.png: the k/n labels do not overlap each other, and the text boxes
    (fit results, purity at the reference magnitude) and legends cover no point, error bar or
    k/n label."""
    _, saved = figures
    (fig,) = _named(saved, "completeness_purity.png")
    r = _renderer(fig)
    for ax in fig.axes:
        labels = [t.get_window_extent(r) for t in ax.texts if t.get_gid() == "count"]
        assert labels and not _overlapping(labels), ax.get_title()
        boxes = [t.get_bbox_patch().get_window_extent(r) for t in ax.texts
                 if t.get_gid() != "count" and t.get_bbox_patch() is not None]
        boxes += [leg.get_window_extent(r) for leg in [ax.get_legend(), *fig.legends] if leg]
        assert boxes
        points = []
        for cont in ax.containers:
            data_line, _, barcols = cont.lines
            points += list(ax.transData.transform(np.column_stack(data_line.get_data())))
            for seg in barcols[0].get_segments():  # each bar sampled along its length
                points += list(ax.transData.transform(
                    np.column_stack([np.full(20, seg[0, 0]), np.linspace(*seg[:, 1], 20)])))
        assert points
        for b in boxes:
            assert not any(b.contains(*p) for p in points), ax.get_title()
            assert not any(_overlapping([b, lab]) for lab in labels), ax.get_title()


def test_counts_start_at_zero(figures):
    """Selection counts.png: counts cannot be negative, so both panels start at 0 (an empty
    sample's axis ran from -0.04 to 0.04)."""
    _, saved = figures
    paths = [p for p in saved if p.endswith("/counts.png") and "/selection/" in p]
    assert paths
    for p in paths:
        for ax in saved[p].axes:
            assert ax.get_ylim()[0] == 0, (p, ax.get_title(), ax.get_ylim())
