"""Tests of simfield.detect: the baseline detector on synthetic mosaics.

Comparison to other codes: GalSim draws the injected sources (galsim.Gaussian), so the expected
fluxes and positions come from outside the project.
"""

import galsim
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.spatial import cKDTree

from simfield.config import DetectionConfig
from simfield.detect import detect_sources, matched_filter
from simfield.errors import ConfigError
from simfield.grid import Grid

SCALE = 0.03  # arcsec/pixel
ZP = 28.0
FWHM = 0.09  # arcsec


def _field(n=25, noise=0.003, seed=7, size=320):
    """Bright, separated Gaussian sources drawn by GalSim at sub-pixel positions, plus noise."""
    rng = np.random.default_rng(seed)
    img = galsim.ImageD(size, size, scale=SCALE)
    gx, gy = np.meshgrid(np.linspace(30, size - 30, 5), np.linspace(30, size - 30, 5))
    x = gx.ravel()[:n] + rng.uniform(-0.5, 0.5, n)
    y = gy.ravel()[:n] + rng.uniform(-0.5, 0.5, n)
    flux = rng.uniform(5.0, 20.0, n)  # e-/s
    for xi, yi, fi in zip(x, y, flux):
        # GalSim positions are 1-based pixel centres
        galsim.Gaussian(fwhm=FWHM, flux=fi).drawImage(
            img, center=galsim.PositionD(xi + 1, yi + 1), add_to_image=True, method="auto")
    sci = img.array + 0.01 + rng.normal(0, noise, img.array.shape)
    wht = np.full(sci.shape, noise**-2)
    return Grid(nx=size, ny=size, scale=SCALE, ra0=53.0, dec0=-27.8), sci, wht, x, y, flux


@pytest.fixture(scope="module")
def detected():
    """Detections on the synthetic field."""
    g, sci, wht, x, y, flux = _field()
    return g, detect_sources(sci, wht, g.wcs, DetectionConfig(), FWHM, ZP, SCALE, exptime=1e4), \
        x, y, flux


def test_finds_every_injected_source_with_position_and_flux(detected):
    """Each GalSim source is found within 0.05 pixel, Kron flux within 3% (a 2.5 r1 Kron
    aperture holds 99% of a Gaussian's light: r1 = sqrt(pi/2) sigma, Kron 1980, ApJS 43, 305)."""
    g, d, x, y, flux = detected
    c = d.catalog
    dist, j = cKDTree(np.column_stack([c["x"], c["y"]])).query(np.column_stack([x, y]))
    assert len(c) == len(x)
    assert dist.max() < 0.05
    assert_allclose(np.asarray(c["flux"])[j], flux, rtol=0.03)
    # AB magnitude from the zero point: m = ZP - 2.5 log10(flux) (definition of ZP_AB)
    assert_allclose(np.asarray(c["mag"])[j], ZP - 2.5 * np.log10(flux), rtol=0, atol=0.035)


def test_sky_positions_follow_the_wcs(detected):
    """RA/Dec of each detection equals astropy's WCS transform of its 0-based pixel position."""
    g, d, *_ = detected
    c = d.catalog
    ra, dec = g.wcs.all_pix2world(c["x"], c["y"], 0)
    assert_allclose(c["ra"], ra, rtol=0, atol=1e-10)
    assert_allclose(c["dec"], dec, rtol=0, atol=1e-10)


def test_aperture_flux_matches_gaussian_enclosed_fraction(detected):
    """Circular-aperture flux = total x (1 - exp(-r^2 / 2 sigma^2)) for a Gaussian (common
    practice), sigma = FWHM / 2.3548."""
    g, d, x, y, flux = detected
    c = d.catalog
    j = cKDTree(np.column_stack([c["x"], c["y"]])).query(np.column_stack([x, y]))[1]
    r = DetectionConfig().aperture_radius_arcsec
    frac = 1 - np.exp(-r**2 / (2 * (FWHM / 2.3548) ** 2))
    assert_allclose(np.asarray(c["flux_aper"])[j], flux * frac, rtol=0.03)


def test_flux_errors_match_scatter_of_empty_apertures():
    """On pure noise of known sigma the aperture error is sigma sqrt(N_pix) (Howell 2006, CCD
    equation in the background-limited case)."""
    g, sci, wht, x, y, flux = _field(n=1)
    d = detect_sources(sci, wht, g.wcs, DetectionConfig(), FWHM, ZP, SCALE)
    r_pix = DetectionConfig().aperture_radius_arcsec / SCALE
    assert_allclose(d.catalog["flux_aper_err"][0], 0.003 * np.sqrt(np.pi * r_pix**2), rtol=0.05)


def test_segmentation_labels_match_catalogue(detected):
    """The segmentation image carries one label per catalogue row, centred on its source."""
    g, d, *_ = detected
    c = d.catalog
    labels = d.segmentation[np.round(c["y"]).astype(int), np.round(c["x"]).astype(int)]
    assert np.array_equal(labels, np.asarray(c["id"]))


def test_pure_noise_gives_few_detections():
    """At 3 sigma on the matched-filtered image with 9 connected pixels, a 320^2 pure-noise
    field gives at most a handful of detections (common practice; regression bound)."""
    rng = np.random.default_rng(0)
    sci = rng.normal(0, 0.003, (320, 320))
    wht = np.full(sci.shape, 0.003**-2)
    g = Grid(nx=320, ny=320, scale=SCALE, ra0=53.0, dec0=-27.8)
    d = detect_sources(sci, wht, g.wcs, DetectionConfig(threshold_sigma=3.0), FWHM, ZP, SCALE)
    assert len(d.catalog) <= 5


def test_matched_filter_equals_astropy_convolve_fft():
    """The matched filter (scipy overlap-add) against the reference library: astropy's
    convolve_fft with the bad pixels masked, boundary and masked pixels filled with 0 and the
    kernel normalised, on an image with a masked block and masked pixels at the edges; equal to
    1e-12 of the image's peak, and 0 at the bad pixels."""
    from astropy.convolution import convolve_fft
    from photutils.segmentation import make_2dgaussian_kernel

    _, sci, _, _, _, _ = _field(size=200)
    bad = np.zeros(sci.shape, bool)
    bad[50:70, 80:120] = True
    bad[0, :30] = bad[:, -1] = True
    for fwhm in (1.2, 3.0, 5.5):
        size = int(2 * np.ceil(2.0 * fwhm) + 1)
        ref = convolve_fft(np.where(bad, 0.0, sci), make_2dgaussian_kernel(fwhm, size=size),
                           mask=bad, normalize_kernel=True, preserve_nan=False,
                           boundary="fill", fill_value=0.0, nan_treatment="fill")
        ref[bad] = 0.0
        got = matched_filter(sci, bad, fwhm)
        assert_allclose(got, ref, rtol=0, atol=1e-12 * np.abs(sci).max())
        assert np.all(got[bad] == 0.0)


def test_deblending_in_two_processes_equals_photutils(monkeypatch):
    """simfield.deblend in two forked processes against the reference library: photutils'
    deblend_sources in one pass, on a field of blended pairs and triples drawn by GalSim; the
    same segmentation pixel for pixel (labels included), and detect_sources gives the same
    catalogue with one or two processes."""
    from photutils.segmentation import deblend_sources
    from photutils.segmentation import detect_sources as segment

    from simfield import deblend as db

    rng = np.random.default_rng(5)
    size = 400
    img = galsim.ImageD(size, size, scale=SCALE)
    for cx, cy in rng.uniform(15, size - 15, (60, 2)):
        for _ in range(rng.integers(1, 4)):  # a few sources close together: blends
            x, y = cx + rng.normal(0, 2.5), cy + rng.normal(0, 2.5)
            galsim.Gaussian(fwhm=2 * FWHM, flux=rng.uniform(2.0, 20.0)).drawImage(
                img, center=galsim.PositionD(x + 1, y + 1), add_to_image=True, method="auto")
    sci = img.array + rng.normal(0, 0.003, img.array.shape)
    conv = matched_filter(sci, np.zeros(sci.shape, bool), 3.0)
    segm = segment(conv, 0.005, n_pixels=9)
    cfg = DetectionConfig()
    ref = deblend_sources(conv, segm, n_pixels=9, n_levels=int(cfg.nlevels),
                          contrast=float(cfg.contrast), progress_bar=False)
    monkeypatch.setattr(db, "MIN_LABELS_APART", 10)
    got = db.deblend(conv, segm, 9, cfg.nlevels, cfg.contrast, processes=2)
    assert segm.n_labels >= 40 and ref.n_labels > segm.n_labels  # there was deblending
    assert np.array_equal(got.data, ref.data)
    g = Grid(nx=size, ny=size, scale=SCALE, ra0=53.0, dec0=-27.8)
    one = detect_sources(sci, np.full(sci.shape, 0.003**-2), g.wcs, cfg, FWHM, ZP, SCALE)
    two = detect_sources(sci, np.full(sci.shape, 0.003**-2), g.wcs, cfg, FWHM, ZP, SCALE,
                         processes=2)
    assert len(one.catalog) > 40 and np.array_equal(one.segmentation, two.segmentation)
    for c in one.catalog.colnames:
        assert np.array_equal(np.asarray(one.catalog[c]), np.asarray(two.catalog[c]),
                              equal_nan=True), c


def test_rejects_mismatched_weight_shape():
    """A weight map of another shape is refused naming 'wht'."""
    g = Grid(nx=50, ny=50, scale=SCALE, ra0=53.0, dec0=-27.8)
    with pytest.raises(ConfigError, match="wht"):
        detect_sources(np.zeros((50, 50)), np.ones((40, 50)), g.wcs, DetectionConfig(), FWHM,
                       ZP, SCALE)


# ------------------------------------------------------------------------------ tiled detection
# Reference implementation: photutils, through the untiled detect_sources on the whole image.
TILE_SIZE = 600
SEAMS = (200, 400)  # core edges of 600 pixels in cores of at most 200


def _seam_field(noise=0.0, seed=11):
    """GalSim Gaussians on a 600^2 mosaic, a third of them straddling the tile seams; flat sky
    plus optional noise; the weight map always says sigma = 0.003 e-/s."""
    rng = np.random.default_rng(seed)
    img = galsim.ImageD(TILE_SIZE, TILE_SIZE, scale=SCALE)
    gx, gy = np.meshgrid(np.linspace(40, 560, 8), np.linspace(40, 560, 8))
    x = np.r_[gx.ravel(), np.repeat(SEAMS, 8) - 0.5 + rng.uniform(-1.5, 1.5, 16),
              rng.uniform(60, 540, 16)]
    y = np.r_[gy.ravel(), rng.uniform(60, 540, 16),
              np.repeat(SEAMS, 8) - 0.5 + rng.uniform(-1.5, 1.5, 16)]
    x[:64] += rng.uniform(-0.5, 0.5, 64)
    y[:64] += rng.uniform(-0.5, 0.5, 64)
    flux = rng.uniform(5.0, 20.0, x.size)  # e-/s
    for xi, yi, fi in zip(x, y, flux):
        galsim.Gaussian(fwhm=2 * FWHM, flux=fi).drawImage(
            img, center=galsim.PositionD(xi + 1, yi + 1), add_to_image=True, method="auto")
    sci = (img.array + 0.01 + (rng.normal(0, noise, img.array.shape) if noise else 0))
    g = Grid(nx=TILE_SIZE, ny=TILE_SIZE, scale=SCALE, ra0=53.0, dec0=-27.8)
    return g, sci.astype(np.float32), np.full(sci.shape, 0.003**-2, np.float32), x, y


def _write_mosaic(path, g, sci, wht):
    """A mosaic file as the survey stage writes it (IMAGE, INVVAR, FLAGS with the no-data bit)."""
    from astropy.io import fits

    h = g.wcs.to_header()
    h["ZP_AB"], h["EXPTIME"] = ZP, 1e4
    dq = fits.ImageHDU(np.zeros(sci.shape, np.int32), h, "FLAGS")
    dq.header["FNODATA"] = 1
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(sci, h, "IMAGE"), fits.ImageHDU(wht, h, "INVVAR"),
                  dq]).writeto(path)


CFG_TILES = DetectionConfig(background_box_arcsec=1.5)  # 50-pixel meshes, 2 per margin


@pytest.mark.parametrize("noise", [0.0, 0.003])
def test_tiled_detection_equals_untiled_photutils(tmp_path, noise):
    """Tiles of 200 + 2 x 100 pixels give the untiled photutils catalogue: same detections,
    each once (none duplicated or lost at the seams), positions within 1e-6 pixel on a flat sky
    (common practice: a constant background is estimated exactly in any tile); with noise the
    spline-interpolated background of a tile differs from the whole image's by ~1e-5 e-/s,
    so positions within 0.01 pixel and Kron fluxes within 0.1%."""
    from simfield.detect import detect_mosaic

    g, sci, wht, x, y = _seam_field(noise)
    _write_mosaic(tmp_path / "m.fits", g, sci, wht)
    ref = detect_sources(sci, wht, g.wcs, CFG_TILES, FWHM, ZP, SCALE, exptime=1e4).catalog
    segm = np.zeros(sci.shape, np.int32)
    got = detect_mosaic(tmp_path / "m.fits", segm, CFG_TILES, FWHM, core=200, margin=100)
    assert got.meta["NTILES"] == 9
    assert len(got) == len(ref)
    dist, j = cKDTree(np.column_stack([ref["x"], ref["y"]])).query(
        np.column_stack([got["x"], got["y"]]))
    assert np.unique(j).size == len(ref)  # one-to-one: nothing kept twice
    assert_allclose(dist, 0, atol=1e-6 if noise == 0 else 0.01)
    assert_allclose(np.asarray(got["flux"]), np.asarray(ref["flux"])[j], rtol=1e-3 if noise
                    else 1e-6)
    near = np.min(np.abs(np.asarray(got["x"])[:, None] - np.array(SEAMS) + 0.5), axis=1) < 2
    assert near.sum() >= 12  # the seam sources are there, and were each kept once
    assert np.array_equal(np.asarray(got["id"]), np.arange(1, len(got) + 1))
    ra, dec = g.wcs.all_pix2world(got["x"], got["y"], 0)
    assert_allclose(got["ra"], ra, rtol=0, atol=1e-10)
    assert_allclose(got["dec"], dec, rtol=0, atol=1e-10)


def test_detection_tiles_in_worker_processes_give_the_same_result(tmp_path):
    """Tiles detected in two forked processes give exactly the serial catalogue and
    segmentation (each tile's result depends on its pixels only; ids follow tile order)."""
    from simfield.detect import detect_mosaic

    g, sci, wht, x, y = _seam_field(0.003)
    _write_mosaic(tmp_path / "m.fits", g, sci, wht)
    seg1, seg2 = np.zeros(sci.shape, np.int32), np.zeros(sci.shape, np.int32)
    one = detect_mosaic(tmp_path / "m.fits", seg1, CFG_TILES, FWHM, core=200, margin=100)
    two = detect_mosaic(tmp_path / "m.fits", seg2, CFG_TILES, FWHM, core=200, margin=100,
                        workers=2)
    assert one.meta["NTILES"] == 9 and len(one) > 20
    assert one.colnames == two.colnames
    for c in one.colnames:
        assert np.array_equal(np.asarray(one[c]), np.asarray(two[c]), equal_nan=True), c
    assert np.array_equal(seg1, seg2) and seg1.max() == len(one)


def test_run_detection_writes_segm_with_global_ids_by_sections(tmp_path, monkeypatch,
                                                                scenario_factory):
    """run_detection with small tile constants writes a SEGMAP (mosaic WCS) whose label at each
    kept detection's centroid pixel is that detection's id, and every footprint pixel of the
    untiled photutils segmentation carries the id of the same object."""
    from astropy.io import fits

    from simfield import detect
    from simfield.io import Provenance

    g, sci, wht, x, y = _seam_field()
    _write_mosaic(tmp_path / "mosaic_b36.fits", g, sci, wht)
    psf = fits.ImageHDU(np.ones((3, 3)), name="PSF_DET")
    psf.header["FWHM"] = FWHM
    fits.HDUList([fits.PrimaryHDU(), psf]).writeto(tmp_path / "psf_b36.fits")
    sc = scenario_factory("detection.bands=[b36]", "detection.background_box_arcsec=1.5")
    monkeypatch.setattr(detect, "TILE_CORE_PIX", 200)
    monkeypatch.setattr(detect, "TILE_MARGIN_PIX", 100)
    counts = detect.run_detection(tmp_path, sc, None, Provenance(3, "0" * 16, "seed: 3"))
    with fits.open(tmp_path / "detections_b36.fits") as hl:
        assert hl[0].header["BAND"] == "b36" and hl[0].header["SIMFSEED"] == 3
        cat = hl["DETECTIONS"].data
        segm = np.asarray(hl["SEGMAP"].data)
        assert_allclose(detect.WCS(hl["SEGMAP"].header).wcs.crval, g.wcs.wcs.crval, rtol=1e-12)
        assert hl["DETECTIONS"].header["NTILES"] == 9
    assert counts["b36"] == len(cat)
    ids = np.asarray(cat["id"])
    cx = np.floor(np.asarray(cat["x"]) + 0.5).astype(int)
    cy = np.floor(np.asarray(cat["y"]) + 0.5).astype(int)
    assert np.array_equal(segm[cy, cx], ids)
    ref = detect_sources(sci, wht, g.wcs, sc.detection, FWHM, ZP, SCALE, exptime=1e4)
    # map each reference label to the tiled id of the same object (centroids within 1e-6 px)
    d, j = cKDTree(np.column_stack([cat["x"], cat["y"]])).query(
        np.column_stack([ref.catalog["x"], ref.catalog["y"]]))
    assert d.max() < 1e-6
    lut = np.zeros(ref.segmentation.max() + 1, int)
    lut[np.asarray(ref.catalog["id"])] = ids[j]
    assert np.array_equal(segm, lut[ref.segmentation])


def test_one_tile_mosaic_gives_exactly_detect_sources(tmp_path):
    """A mosaic not larger than one core is one tile: the catalogue and segmentation equal
    those of detect_sources on the whole image, bit for bit."""
    from simfield.detect import detect_mosaic

    from astropy.io import fits
    from astropy.wcs import WCS

    g, sci, wht, x, y = _seam_field(0.003)
    _write_mosaic(tmp_path / "m.fits", g, sci, wht)
    # as run_detection always did: WCS and pixel scale read back from the file's header
    w = WCS(fits.getheader(tmp_path / "m.fits", "IMAGE"))
    scale = float(np.sqrt(abs(np.linalg.det(w.pixel_scale_matrix))) * 3600.0)
    ref = detect_sources(sci, wht, w, CFG_TILES, FWHM, ZP, scale, exptime=1e4)
    segm = np.zeros(sci.shape, np.int32)
    got = detect_mosaic(tmp_path / "m.fits", segm, CFG_TILES, FWHM, core=TILE_SIZE)
    assert got.meta["NTILES"] == 1
    for c in ref.catalog.colnames:
        assert np.array_equal(np.asarray(got[c]), np.asarray(ref.catalog[c]), equal_nan=True), c
    assert np.array_equal(segm, ref.segmentation)


@pytest.mark.parametrize("n,core,margin,align", [(600, 200, 100, 50), (10000, 3072, 256, 75),
                                                 (3072, 3072, 256, 75), (97, 16, 5, 8)])
def test_tile_cores_cover_the_axis_once(n, core, margin, align):
    """Cores partition [0, n) into ceil(n / core) pieces of at most core pixels; each tile
    holds its core plus at least the margin (clipped at the edges), starting on a mesh edge."""
    from simfield.detect import tile_bounds

    t = np.array(tile_bounds(n, core, margin, align))
    assert len(t) == -(-n // core)
    assert t[0, 1] == 0 and t[-1, 2] == n and np.array_equal(t[1:, 1], t[:-1, 2])
    assert np.all(t[:, 2] - t[:, 1] <= core)
    assert np.all(t[:, 0] % align == 0)
    assert np.all(t[:, 0] <= np.maximum(t[:, 1] - margin, 0))
    assert np.all(t[:, 3] == np.minimum(t[:, 2] + margin, n))


def test_tiles_refuse_a_tiny_core(tmp_path):
    """A tile core below 16 pixels is refused naming 'core'."""
    from simfield.detect import detect_mosaic

    g, sci, wht, *_ = _seam_field()
    _write_mosaic(tmp_path / "m.fits", g, sci, wht)
    with pytest.raises(ConfigError, match="core"):
        detect_mosaic(tmp_path / "m.fits", None, CFG_TILES, FWHM, core=4)
