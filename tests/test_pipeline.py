"""End-to-end: one small scenario through every stage; outputs, determinism, flux, WCS."""

import json
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from numpy.testing import assert_allclose

from simfield.io import COMPLETE_MARKER
from simfield.pipeline import run_scenario
from tests.conftest import make_scenario


def small_scenario(tmp_path, *overrides):
    """survey=quick shrunk to 10" with two bands and small PSFs (seconds to run); no report
    pages (tests/test_report.py turns them on and checks them)."""
    sc = make_scenario("survey=quick", "survey.width_arcsec=10", "survey.height_arcsec=10",
                       "telescope.psf.spike_radius_arcsec=2.0",
                       "telescope.psf.core_radius_arcsec=1.0",
                       "population.star_density_arcmin2=400", "score.report=false",
                       "selection.report=false", *overrides)
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name in ("b13", "b23")]
    return sc


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("run")
    sc = small_scenario(tmp)
    res = run_scenario(sc, tmp / "a")
    return sc, res


@pytest.fixture(scope="module")
def mosaics_only(tmp_path_factory):
    """The same scenario stopped at the mosaics (detection off): the rerun of
    test_same_seed_identical_other_seed_different and the one-tile run of
    test_tiling_changes_no_truth_and_leaves_no_seams (one run for both)."""
    tmp = tmp_path_factory.mktemp("mosaics")
    return run_scenario(small_scenario(tmp, "detection.enabled=false"), tmp / "b")


def test_every_contract_file_is_written(run):
    """The output contract of the README: every file, valid FITS, provenance in headers."""
    sc, res = run
    out = res.out_dir
    for band in ("b13", "b23"):
        names = [f"mosaic_{band}.fits", f"truth_image_{band}.fits", f"psf_{band}.fits"]
        if band in sc.detection.bands:
            names.append(f"detections_{band}.fits")
        for name in names:
            with fits.open(out / name) as hl:
                hl.verify("exception")
                assert hl[0].header["SIMFSEED"] == sc.seed
                assert len(hl[0].header["SIMFHASH"]) == 16
        with fits.open(out / f"mosaic_{band}.fits") as hl:
            assert [h.name for h in hl[1:]] == ["IMAGE", "INVVAR", "EXPOSURE", "FLAGS", "NOISECOR"]
            assert hl["IMAGE"].header["BUNIT"] == "electron/s"
            assert hl["IMAGE"].header["EXPTIME"] > 0 and "ZP_AB" in hl["IMAGE"].header
            assert WCS(hl["IMAGE"].header).wcs.ctype[0] == "RA---TAN"
        with fits.open(out / f"psf_{band}.fits") as hl:
            assert hl["PSF"].header["PIXSCALE"] > 0 and hl["PSF"].header["PIVOT"] > 0
    for name in ("truth.fits", "bands.ecsv", "summary.json", COMPLETE_MARKER):
        assert (out / name).exists()
    assert not list(Path(out).rglob("*.part"))
    bands = Table.read(out / "bands.ecsv")
    assert list(bands["name"]) == ["b13", "b23"] and bands.meta["seed"] == sc.seed


def test_truth_tables_columns(run):
    """SOURCES and IMAGES carry the documented columns and units."""
    _, res = run
    src = Table.read(res.out_dir / "truth.fits", hdu="SOURCES")
    img = Table.read(res.out_dir / "truth.fits", hdu="IMAGES")
    for c in ("id", "kind", "ra", "dec", "redshift", "abs_mag_uv", "mag_b13", "mag_b23",
              "r_half", "sersic_n", "axis_ratio", "position_angle", "magnification",
              "n_images"):
        assert c in src.colnames, c
    for c in ("image_id", "source_id", "ra", "dec", "x", "y", "magnification", "mag_b13"):
        assert c in img.colnames, c
    assert str(src["ra"].unit) == "deg" and str(src["r_half"].unit) == "arcsec"
    assert set(np.char.decode(src["kind"].astype("S"))) <= {"galaxy", "star", "member"}


def test_truth_positions_round_trip_through_file_wcs(run):
    """Truth RA/Dec -> pixel with astropy's WCS read from the mosaic header gives x, y."""
    _, res = run
    img = Table.read(res.out_dir / "truth.fits", hdu="IMAGES")
    w = WCS(fits.getheader(res.out_dir / "mosaic_b23.fits", "IMAGE"))
    x, y = w.all_world2pix(img["ra"], img["dec"], 0)
    assert_allclose(x, img["x"], atol=1e-6)
    assert_allclose(y, img["y"], atol=1e-6)


def test_noiseless_scene_conserves_flux(run):
    """Summed truth image equals the summed rates of sources well inside the field (0.5%)."""
    _, res = run
    src = Table.read(res.out_dir / "truth.fits", hdu="SOURCES")
    with fits.open(res.out_dir / "truth_image_b23.fits") as hl:
        img, zp = hl["IMAGE"].data.astype(float), hl["IMAGE"].header["ZP_AB"]
    ny, nx = img.shape
    # sum inside a box 1.5" from the edges, sources whose light stays inside it
    m = 50  # mosaic pixels (1.5")
    box = img[m:ny - m, m:nx - m].sum()
    x, y = np.asarray(src["x"]), np.asarray(src["y"])
    inner = (x > m + 25) & (x < nx - m - 25) & (y > m + 25) & (y < ny - m - 25)
    outer = (x > m - 25) & (x < nx - m + 25) & (y > m - 25) & (y < ny - m + 25)
    rate = 10 ** (-0.4 * (np.asarray(src["mag_b23"], float) - zp))
    rate[~np.isfinite(rate)] = 0
    # sources straddling the box edge make the comparison a bracket
    assert rate[inner].sum() * 0.995 <= box <= rate[outer].sum() * 1.005


def test_star_light_centred_on_truth_position(tmp_path):
    """Point sources: light centroid in the noiseless image = truth x, y (0.02 px).

    A field of stars only (injection mode with no galaxies), so no neighbour's light biases
    the centroid; the PSF of a centrosymmetric intensity keeps the centroid (common practice):
    the perfect telescope, as coma and trefoil in the default wavefront move the centroid.
    """
    sc = small_scenario(tmp_path, "telescope=lantern_ideal", "population=uniform",
                        "population.uniform_density_arcmin2=0",
                        "population.star_mag_min=20", "population.star_mag_max=22",
                        "detection.enabled=false")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name == "b23"]  # the band read
    res = run_scenario(sc, tmp_path / "stars")
    src = Table.read(res.out_dir / "truth.fits", hdu="SOURCES")
    img = fits.getdata(res.out_dir / "truth_image_b23.fits", "IMAGE").astype(float)
    h, checked = 8, 0
    for s in src:
        x0, y0 = int(round(s["x"])), int(round(s["y"]))
        if not (h <= x0 < img.shape[1] - h and h <= y0 < img.shape[0] - h):
            continue
        if np.sort(np.hypot(src["x"] - s["x"], src["y"] - s["y"]))[1] < 40:
            continue  # a neighbour's wings reach the window
        cut = img[y0 - h:y0 + h + 1, x0 - h:x0 + h + 1]
        yy, xx = np.mgrid[-h:h + 1, -h:h + 1]
        cx, cy = (cut * xx).sum() / cut.sum() + x0, (cut * yy).sum() / cut.sum() + y0
        assert_allclose([cx, cy], [s["x"], s["y"]], atol=0.02)
        checked += 1
    assert checked >= 1


def test_same_seed_identical_other_seed_different(run, mosaics_only, tmp_path):
    """Same scenario and seed give byte-identical science arrays; another seed differs. The
    reruns stop at the mosaics (the stages after them only read the mosaics, and each draws
    from its own named streams)."""
    sc, res = run
    again = mosaics_only
    other = run_scenario(small_scenario(tmp_path, "detection.enabled=false", "seed=2"),
                         tmp_path / "c")
    a = fits.getdata(res.out_dir / "mosaic_b13.fits", "IMAGE")
    assert np.array_equal(a, fits.getdata(again.out_dir / "mosaic_b13.fits", "IMAGE"))
    assert not np.array_equal(a, fits.getdata(other.out_dir / "mosaic_b13.fits", "IMAGE"))


def test_lensed_run_lists_every_image_with_magnification(tmp_path, monkeypatch):
    """lens=cluster: images solve the lens equation and carry mu = 1/((1-k)^2-g^2)
    (Schneider, Ehlers & Falco 1992, eq. 5.26); lens maps are written, lens.png outlining the
    mosaic's footprint as the field and convergence.fits stating the margin it covers besides."""
    import simfield.lensing
    from simfield.lensing import build_lens

    pictures, draw = [], simfield.lensing.write_lens_png

    def keep(*a, **k):  # lens.png's figure, to read its outlines back
        pictures.append(draw(*a, **k))
        return pictures[-1]

    monkeypatch.setattr(simfield.lensing, "write_lens_png", keep)
    # one exposure: the checks are of the truth tables and truth images, not of the mosaic
    sc = small_scenario(tmp_path, "lens=cluster", "survey.width_arcsec=24",
                        "survey.height_arcsec=24", "detection.enabled=false",
                        "survey.n_exposures=1")
    res = run_scenario(sc, tmp_path / "lensed")
    for name in ("convergence.fits", "critical_curves.ecsv", "lens.png"):
        assert (res.out_dir / name).exists()
    # the mosaic's footprint (arcsec) from its own header (astropy), centred on the field
    from astropy.wcs.utils import proj_plane_pixel_scales

    hdr = fits.getheader(res.out_dir / "mosaic_b13.fits", "IMAGE")
    w, h = np.array([hdr["NAXIS1"], hdr["NAXIS2"]]) * proj_plane_pixel_scales(WCS(hdr)) * 3600
    (field,) = [p for p in pictures[0].axes[0].patches if p.get_gid() == "field"]
    assert_allclose(field.get_bbox().extents, [-w / 2, -h / 2, w / 2, h / 2], atol=1e-9)
    kappa = fits.getheader(res.out_dir / "convergence.fits", "KAPPA")
    assert_allclose([kappa["MOSAICW"], kappa["MOSAICH"]], [w, h])
    # the map covers the mosaic and the margin the sources are drawn on (0.2" pixels)
    assert kappa["MARGIN"] > 0
    assert_allclose(kappa["NAXIS1"] * 0.2, w + 2 * kappa["MARGIN"], atol=0.2)
    (margin,) = [p for p in pictures[0].axes[0].patches if p.get_gid() == "margin"]
    assert_allclose(margin.get_bbox().width, w + 2 * kappa["MARGIN"], atol=1e-9)
    src = Table.read(res.out_dir / "truth.fits", hdu="SOURCES")
    img = Table.read(res.out_dir / "truth.fits", hdu="IMAGES")
    assert np.any(src["n_images"] > 1)
    kind = np.char.decode(src["kind"].astype("S"))
    members = src[kind == "member"]
    assert len(members) == sc.lens.n_members
    # the intracluster light holds icl_fraction of the members' flux in every band
    icl = src[kind == "icl"]
    assert len(icl) == 1
    for b in ("b13", "b23"):
        f_members = np.sum(10 ** (-0.4 * np.asarray(members[f"mag_{b}"])))
        assert_allclose(10 ** (-0.4 * icl[f"mag_{b}"][0]), sc.lens.icl_fraction * f_members,
                        rtol=1e-9)
    lens = build_lens(sc.lens, members)  # the same lens rebuilt from the truth table
    bg = img[np.isin(img["source_id"], src["id"][src["redshift"] > sc.lens.redshift])]
    z = src["redshift"][bg["source_id"] - 1]
    k = lens.convergence(bg["x_arcsec"], bg["y_arcsec"], z)
    g1, g2 = lens.shear(bg["x_arcsec"], bg["y_arcsec"], z)
    mu = 1.0 / ((1 - k) ** 2 - g1**2 - g2**2)
    assert_allclose(bg["magnification"], mu, rtol=1e-3)
    # total magnification of a source = sum of |mu| of its images
    tot = np.bincount(img["source_id"], weights=np.abs(img["magnification"]),
                      minlength=len(src) + 1)[1:]
    assert_allclose(src["magnification"], tot, rtol=1e-9)
    # cut into 2 x 2 tiles, whose seams cross at the field centre, 3.6" from the halo (well
    # inside its critical curves), so arcs and multiple images straddle them: the same truth
    # image (common practice: the result must not show how it was computed)
    tiled = run_scenario(small_scenario(tmp_path, "lens=cluster", "survey.width_arcsec=24",
                                        "survey.height_arcsec=24", "detection.enabled=false",
                                        "survey.n_exposures=1", "survey.tile_pixels=300"),
                           tmp_path / "lensed_tiled")
    for b in ("b13", "b23"):
        one = fits.getdata(res.out_dir / f"truth_image_{b}.fits", "IMAGE")
        many = fits.getdata(tiled.out_dir / f"truth_image_{b}.fits", "IMAGE")
        assert_allclose(many, one, rtol=0, atol=1e-5 * one.max())


def test_external_catalogue_scores_like_the_built_in_path(run, tmp_path):
    """A catalogue from another detector configuration, written as CSV with its own column
    names and fluxes in uJy, scores through simfield-score; the run's own detections scored
    that way reproduce the built-in numbers (same matching, common practice)."""
    from dataclasses import replace

    from simfield.detect import detect_sources
    from simfield.score.run import score_main_args

    sc, res = run
    band = sc.detection_bands[0]
    own = json.loads((res.out_dir / "score" / band / "summary.json").read_text())
    with fits.open(res.out_dir / f"mosaic_{band}.fits") as hl:
        sci, wht, hdr = hl["IMAGE"].data, hl["INVVAR"].data, hl["IMAGE"].header
    fwhm = fits.getheader(res.out_dir / f"psf_{band}.fits", "PSF_DET")["FWHM"]
    strict = replace(sc.detection, threshold_sigma=4.0)
    cat = detect_sources(sci, wht, WCS(hdr), strict, fwhm, hdr["ZP_AB"], 0.04).catalog
    ext = Table({"RAJ": cat["ra"], "DEJ": cat["dec"], "F_UJY": cat["flux_njy"] / 1e3})
    ext = ext[ext["F_UJY"] > 0]
    ext.write(tmp_path / "ext.csv")
    assert score_main_args([str(res.out_dir), "--catalog", str(tmp_path / "ext.csv"),
                            "--band", band, "--ra-col", "RAJ", "--dec-col", "DEJ",
                            "--flux-col", "F_UJY", "--flux-unit", "uJy", "--no-report",
                            "--allow-flux-offset",  # a 10" field: under 10 bright matches
                            "--out", str(tmp_path / "s1")]) == 0
    got = json.loads((tmp_path / "s1" / "summary.json").read_text())
    assert got["n_detections"] == len(ext) and got["n_matched"] <= own["n_matched"]
    mine = Table.read(res.out_dir / f"detections_{band}.fits", hdu="DETECTIONS")
    Table({"ra": mine["ra"], "dec": mine["dec"], "mag": mine["mag"]}).write(
        tmp_path / "own.ecsv")
    assert score_main_args([str(res.out_dir), "--catalog", str(tmp_path / "own.ecsv"),
                            "--band", band, "--no-report", "--skip-invalid",
                            "--out", str(tmp_path / "s2")]) == 0
    again = json.loads((tmp_path / "s2" / "summary.json").read_text())
    assert again["n_matched"] == own["n_matched"]


def test_tiling_changes_no_truth_and_leaves_no_seams(mosaics_only, tmp_path):
    """Cutting the field into 4 x 4 tiles gives the same noiseless truth image, segmentation
    and noisy mosaic as one tile, so no seam shows in the noise or its pixel-to-pixel
    correlation (common practice: a mosaic must not show how it was computed)."""
    one = mosaics_only
    many = run_scenario(small_scenario(tmp_path, "detection.enabled=false",
                                       "survey.tile_pixels=64"), tmp_path / "many")
    b = "b23"
    with fits.open(one.out_dir / f"truth_image_{b}.fits") as a, \
            fits.open(many.out_dir / f"truth_image_{b}.fits") as c:
        sa, sc_ = a["IMAGE"].data, c["IMAGE"].data
        assert_allclose(sc_, sa, rtol=0, atol=1e-6 * sa.max())
        assert np.array_equal(a["SEGMAP"].data, c["SEGMAP"].data)
    with fits.open(one.out_dir / f"mosaic_{b}.fits") as a, \
            fits.open(many.out_dir / f"mosaic_{b}.fits") as c:
        for ext in ("IMAGE", "INVVAR"):
            assert_allclose(c[ext].data, a[ext].data, rtol=1e-5, atol=1e-6 * a[ext].data.max())
        for ext in ("EXPOSURE", "FLAGS"):
            assert np.array_equal(c[ext].data, a[ext].data)


def test_written_exposures_are_whole_and_consistent_with_their_wcs(tmp_path):
    """With survey.write_exposures and 4 x 4 tiles, every detector pixel of every exposure is
    written once (none left at the file's zero fill) and a bright star sits where the
    exposure's own WCS puts it (astropy.wcs all_world2pix)."""
    sc = small_scenario(tmp_path, "detection.enabled=false", "survey.write_exposures=true",
                        "survey.tile_pixels=64", "detector.cosmic_rays=false")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name == "b23"]  # the band read
    res = run_scenario(sc, tmp_path / "exp")
    files = sorted((res.out_dir / "exposures").glob("exp_b23_*.fits"))
    assert len(files) == sc.survey.n_exposures
    src = Table.read(res.out_dir / "truth.fits", hdu="SOURCES")
    stars = src[np.char.decode(src["kind"].astype("S")) == "star"]
    # the brightest star whose 7 x 7 box lies on every exposure (stars are drawn over the
    # field plus a margin: one beyond an exposure's edge has no pixels there to measure)
    inside = np.ones(len(stars), bool)
    for f in files:
        with fits.open(f) as hl:
            ny, nx = hl["IMAGE"].data.shape
            x, y = WCS(hl["IMAGE"].header).all_world2pix(stars["ra"], stars["dec"], 0)
        inside &= (x > 4) & (x < nx - 5) & (y > 4) & (y < ny - 5)
    star = stars[inside][np.argmin(stars["mag_b23"][inside])]
    for f in files:
        with fits.open(f) as hl:
            var, sci = hl["VARIANCE"].data, hl["IMAGE"].data
            assert np.all(var > 0) and np.all(np.isfinite(sci))
            x, y = WCS(hl["IMAGE"].header).all_world2pix(star["ra"], star["dec"], 0)
        ix, iy = int(round(float(x))), int(round(float(y)))
        cut = sci[iy - 3:iy + 4, ix - 3:ix + 4] - np.median(sci)
        yy, xx = np.mgrid[iy - 3:iy + 4, ix - 3:ix + 4]
        assert_allclose([(cut * xx).sum() / cut.sum(), (cut * yy).sum() / cut.sum()],
                        [float(x), float(y)], atol=0.15)


def test_field_without_empty_sky_still_completes(tmp_path):
    """A field too small (or crowded) for empty-sky apertures finishes, with the measured depth
    left out (null in summary.json) and the predicted one given (common practice: a missing
    diagnostic is not a failed run)."""
    sc = small_scenario(tmp_path, "survey.width_arcsec=3", "survey.height_arcsec=3",
                        "detection.aperture_radius_arcsec=1.4", "detection.enabled=false")
    res = run_scenario(sc, tmp_path / "tiny")
    assert (res.out_dir / COMPLETE_MARKER).exists()
    depth = json.loads((res.out_dir / "summary.json").read_text())["depth_ab"]
    for d in depth.values():
        assert d["measured_5sigma"] is None and np.isfinite(d["predicted_5sigma"])


def test_one_arcsec_field_without_detections_completes(tmp_path, capsys):
    """The smallest field validation accepts (1" x 1", 25 mosaic pixels: smaller than the
    41 x 41 lags of the read-noise covariance) with no detection: the run completes with
    empty catalogues, completeness 0 and empty selections, and simfield-score rescores it
    (status 0). Before, the covariance failed on the small patch, and zero detections
    crashed the selection's join, the scorer and the injector with tracebacks (a user's
    empty or tiny field is an answer, not an error: common practice)."""
    from simfield.score.run import score_main_args

    sc = make_scenario("survey=quick", "survey.width_arcsec=1", "survey.height_arcsec=1",
                       "telescope.psf.spike_radius_arcsec=2.0",
                       "telescope.psf.core_radius_arcsec=1.0", "score.report=false",
                       "selection.report=false", "population.star_density_arcmin2=0")
    out = tmp_path / "tiny"
    res = run_scenario(sc, out)  # all five bands: every selection sample is evaluated
    assert (out / COMPLETE_MARKER).exists()
    s = res.summary
    assert s["detections"] == {"b36": 0}
    assert s["score"]["b36"]["n_detections"] == 0 and s["score"]["b36"]["n_matched"] == 0
    assert s["selection"] and all(v["n_selected"] == 0 for v in s["selection"].values())
    assert score_main_args([str(out), "--out", str(tmp_path / "rescored")]) == 0
    assert "0 of 0 detections matched" in capsys.readouterr().out


def test_gather_takes_from_empty_arrays():
    """score.match.gather: values[index] where index >= 0, fill at -1, as numpy's take; an
    empty array with only -1 gives the fill (the no-detection case)."""
    from simfield.score.match import gather

    assert_allclose(gather([1.0, 2.0, 3.0], [2, -1, 0], np.nan), [3.0, np.nan, 1.0])
    assert list(gather(np.array([], bool), [-1, -1], False)) == [False, False]
    assert list(gather(np.array([], "U3"), [-1], "")) == [""]
    with pytest.raises(IndexError):
        gather(np.array([]), [0], 0.0)


def test_stages_that_cannot_run_are_told_not_skipped_silently(run, mosaics_only):
    """A stage enabled but starved of its input says so (summary.json 'skipped', the
    command's last lines, the log): photo-z and selection read the photometry, which reads
    the detections; photo-z needs colours, so two bands or more (common practice). Before,
    switching photometry off dropped the selection without a word."""
    from simfield.pipeline import skipped_stages

    sc, res = run
    assert skipped_stages(sc) == {} and res.summary["skipped"] == {}
    assert set(mosaics_only.summary["skipped"]) == {"photometry", "photoz", "selection",
                                                    "score"}
    off = make_scenario("photometry.enabled=false")
    assert skipped_stages(off) == {
        "photoz": "needs photometry (photometry.enabled=false)",
        "selection": "needs photometry (photometry.enabled=false)"}
    one = make_scenario()
    one.telescope.bands = one.telescope.bands[-1:]
    assert skipped_stages(one) == {"photoz": "needs two bands or more (bands: b36)"}
    quiet = make_scenario("detection.enabled=false", "score.enabled=false",
                          "photometry.enabled=false", "photoz.enabled=false",
                          "selection.enabled=false")
    assert skipped_stages(quiet) == {}
