"""Tests of simfield.survey: grids, scene sampling, drizzle, depths, FITS HDUs.

Comparison to outside sources
-----------------------------
- Pixel integration: GalSim drawImage (method "real_space" integrates over each pixel); other
  tests use exactly pixel-integrated Gaussians from the normal CDF (scipy.special.ndtr)
  on the detector grid directly, against the scene drawn by GalSim and summed by sample_scene.
- Positions: astropy.wcs (all_world2pix) of each exposure and mosaic WCS, against centroids.
- Drizzle: flux conservation of the square kernel (Fruchter & Hook 2002, PASP 114, 144, eq. 5).
- Depth: CCD equation (Howell 2006, "Handbook of CCD Astronomy", eq. 4.4) for a CDS readout;
  background-limited depth improves by 1.25 log10 N for N equal exposures (same source).
"""

from __future__ import annotations

import dataclasses
import math
from types import SimpleNamespace

import galsim
import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from numpy.testing import assert_allclose
from scipy.special import ndtr

from simfield import detector as dt
from simfield import survey as sv
from simfield.config import DetectorConfig, SurveyConfig, TelescopeConfig
from simfield.errors import ConfigError
from simfield.grid import Grid

TEL = TelescopeConfig(name="test", diameter_m=6.1, collecting_area_m2=21.5)
SMALL = SurveyConfig(name="small", width_arcsec=8.0, height_arcsec=8.0, n_exposures=4)


def _gauss_scene(grid: Grid, xi, eta, flux, sigma=0.06):
    """Circular Gaussians integrated exactly over each pixel (products of normal CDF
    differences, scipy.special.ndtr) at tangent-plane offsets (arcsec) on ``grid``."""
    out = np.zeros(grid.shape)
    px, py = grid.offsets_to_pixel(np.asarray(xi), np.asarray(eta))
    s = sigma / grid.scale
    ex = np.arange(grid.nx + 1) - 0.5
    ey = np.arange(grid.ny + 1) - 0.5
    for x, y, f in zip(np.atleast_1d(px), np.atleast_1d(py), np.atleast_1d(flux)):
        wx = np.diff(ndtr((ex - x) / s))
        wy = np.diff(ndtr((ey - y) / s))
        out += f * np.outer(wy, wx)
    return out


def _galsim_scene(grid: Grid, xi, eta, flux, sigma=0.06):
    """GalSim Gaussians integrated over each pixel (real-space convolution with the pixel)
    at tangent-plane offsets (arcsec) on ``grid``."""
    out = np.zeros(grid.shape)
    cx, cy = grid.center_pixel
    px, py = grid.offsets_to_pixel(np.asarray(xi), np.asarray(eta))
    for x, y, f in zip(np.atleast_1d(px), np.atleast_1d(py), np.atleast_1d(flux)):
        img = galsim.ImageD(grid.nx, grid.ny, scale=grid.scale)
        galsim.Gaussian(sigma=sigma, flux=f).drawImage(
            image=img, offset=(x - cx, y - cy), method="real_space")
        out += img.array
    return out


def _centroid(img, x, y, r):
    """Flux-weighted centroid (0-based x, y) in a box of half-size r around (x, y)."""
    xi, yi = int(round(x)), int(round(y))
    cut = img[yi - r:yi + r + 1, xi - r:xi + r + 1]
    yy, xx = np.mgrid[yi - r:yi + r + 1, xi - r:xi + r + 1]
    return (cut * xx).sum() / cut.sum(), (cut * yy).sum() / cut.sum()


def _noiseless(rate):
    """An Exposure-like object without noise (unit variance, no flags)."""
    return SimpleNamespace(sci=rate, var=np.ones_like(rate), var_sky=np.ones_like(rate),
                           dq=np.zeros(rate.shape, np.int32), exptime=100.0, sky=0.0)


def test_dq_bits_agree_with_detector():
    """The survey's DQ bits are the detector's."""
    for name in ("DQ_HOT", "DQ_DEAD", "DQ_COSMIC_RAY", "DQ_SATURATED", "DQ_NO_SLOPE",
                 "DQ_BAD_NEIGHBOUR", "DQ_EXCLUDE"):
        assert getattr(sv, name) == getattr(dt, name)


def test_grids_cover_the_field():
    """Every exposure grid and the scene grid contain the whole mosaic footprint."""
    sg = sv.scene_grid(SMALL, TEL)
    mg = sv.mosaic_grid(SMALL)
    assert sg.scale == pytest.approx(0.02, rel=1e-12) and mg.nx == round(8.0 / 0.03)
    corners = np.array([[-0.5, -0.5], [mg.nx - 0.5, -0.5], [-0.5, mg.ny - 0.5],
                        [mg.nx - 0.5, mg.ny - 0.5]])
    xi, eta = mg.pixel_to_offsets(corners[:, 0], corners[:, 1])
    for roll in (0.0, 30.0):
        s = dataclasses.replace(SMALL, roll_deg=roll)
        grids = sv.exposure_grids(s, TEL, np.random.default_rng(0))
        sg = sv.scene_grid(s, TEL)
        for g in grids:
            assert np.all(g.contains(*g.offsets_to_pixel(xi, eta)))
            # every detector pixel corner lies on the scene
            gx = np.array([-0.5, g.nx - 0.5, -0.5, g.nx - 0.5])
            gy = np.array([-0.5, -0.5, g.ny - 0.5, g.ny - 0.5])
            assert np.all(sg.contains(*sg.offsets_to_pixel(*g.pixel_to_offsets(gx, gy))))


def test_dithers_sample_subpixel_phases():
    """Dither offsets differ by more than a pixel and cover distinct sub-pixel phases."""
    off = sv.dither_offsets(SMALL, TEL, np.random.default_rng(1))
    p = TEL.pixel_scale_arcsec
    phase = (off / p) % 1.0
    assert off.shape == (4, 2)
    assert np.ptp(off[:, 0]) >= SMALL.dither_step_arcsec * 0.9
    d = np.abs(phase[:, None, :] - phase[None, :, :])
    d = np.minimum(d, 1 - d).max(axis=2)
    assert d[~np.eye(4, dtype=bool)].min() > 0.1


def test_sample_scene_matches_galsim_pixel_integration():
    """Summed scene equals GalSim drawing on the detector pixels (exact for aligned edges)."""
    sg = Grid(nx=200, ny=200, scale=0.02, ra0=150.0, dec0=2.0)
    xi, eta, flux = [0.31, -0.6], [0.2, -0.45], [100.0, 50.0]
    scene = _galsim_scene(sg, xi, eta, flux)
    # shift by whole scene pixels: detector pixel edges fall on scene pixel edges
    g = Grid(nx=90, ny=90, scale=0.04, ra0=150.0, dec0=2.0, xi0=0.02, eta0=-0.04)
    ref = _galsim_scene(g, xi, eta, flux)
    assert_allclose(sv.sample_scene(scene, sg, g), ref, atol=2e-4 * ref.max())
    # sub-pixel shift: fractional edge weights treat the scene as piecewise constant, an error
    # of order (scene pixel / sigma)^2 / 8 ~ 3% at the peak for sigma = 3 scene pixels
    g2 = Grid(nx=90, ny=90, scale=0.04, ra0=150.0, dec0=2.0, xi0=0.013, eta0=-0.007)
    ref2 = _galsim_scene(g2, xi, eta, flux)
    out2 = sv.sample_scene(scene, sg, g2)
    assert_allclose(out2, ref2, atol=0.03 * ref2.max())
    assert_allclose(out2.sum(), scene.sum(), rtol=1e-5)


def test_sample_scene_with_roll_conserves_flux():
    """A rolled detector receives the scene's flux to 0.5%."""
    sg = Grid(nx=300, ny=300, scale=0.02, ra0=150.0, dec0=2.0)
    rng = np.random.default_rng(3)
    xi, eta = rng.uniform(-1.5, 1.5, 20), rng.uniform(-1.5, 1.5, 20)  # well inside the detector
    scene = _gauss_scene(sg, xi, eta, rng.uniform(10, 100, 20))
    g = Grid(nx=130, ny=130, scale=0.04, ra0=150.0, dec0=2.0, roll_deg=27.0, xi0=0.011)
    assert_allclose(sv.sample_scene(scene, sg, g).sum(), scene.sum(), rtol=0.005)


def test_positions_round_trip_through_exposure_and_mosaic_wcs():
    """Source centroids land where astropy's WCS of each exposure and of the mosaic puts them."""
    s = dataclasses.replace(SMALL, pointing_rms_arcsec=0.01)
    sg = sv.scene_grid(s, TEL)
    mg = sv.mosaic_grid(s)
    grids = sv.exposure_grids(s, TEL, np.random.default_rng(2))
    rng = np.random.default_rng(4)
    # six sources at least 2" apart, each jittered within a pixel
    xi = np.array([-2.5, 0.0, 2.5, -2.5, 0.0, 2.5]) + rng.uniform(-0.04, 0.04, 6)
    eta = np.array([-1.5, -1.5, -1.5, 1.5, 1.5, 1.5]) + rng.uniform(-0.04, 0.04, 6)
    ra, dec = sg.offsets_to_sky(xi, eta)
    scene = _gauss_scene(sg, xi, eta, np.full(6, 100.0), sigma=0.08)
    exposures = []
    for g in grids:
        img = sv.sample_scene(scene, sg, g)
        w = WCS(g.wcs.to_header())
        px, py = w.all_world2pix(ra, dec, 0)
        for k in range(6):
            assert_allclose(_centroid(img, px[k], py[k], r=9), (px[k], py[k]), atol=0.02)
        exposures.append(_noiseless(img))
    mosaic = sv.drizzle_mosaic(exposures, grids, mg, "square", 0.8)
    mx, my = WCS(mg.wcs.to_header()).all_world2pix(ra, dec, 0)
    for k in range(6):
        assert_allclose(_centroid(mosaic.sci, mx[k], my[k], r=12), (mx[k], my[k]), atol=0.03)


@pytest.mark.parametrize("roll", [0.0, 12.0])
def test_drizzle_conserves_flux(roll):
    """Drizzle (square kernel) keeps the total flux (Fruchter & Hook 2002)."""
    s = dataclasses.replace(SMALL, roll_deg=roll)
    sg = sv.scene_grid(s, TEL)
    mg = sv.mosaic_grid(s)
    grids = sv.exposure_grids(s, TEL, np.random.default_rng(5))
    rng = np.random.default_rng(6)
    xi, eta, flux = rng.uniform(-3, 3, 15), rng.uniform(-3, 3, 15), rng.uniform(5, 50, 15)
    scene = _gauss_scene(sg, xi, eta, flux)
    exposures = [_noiseless(sv.sample_scene(scene, sg, g)) for g in grids]
    mosaic = sv.drizzle_mosaic(exposures, grids, mg, "square", 0.8)
    assert_allclose(mosaic.sci.sum(), flux.sum(), rtol=0.005)
    assert_allclose(np.median(mosaic.exp), 4 * 100.0, rtol=1e-6)
    assert np.all(mosaic.dq & sv.MOSAIC_NO_DATA == 0)


def test_turbo_equals_square_for_aligned_drops():
    """The drizzle library's turbo and square kernels agree for axis-aligned pixels."""
    from drizzle.resample import Drizzle

    data = np.random.default_rng(0).random((40, 40)).astype(np.float32)
    y, x = np.indices(data.shape, dtype=float)
    r = 0.75
    pm = np.dstack([x / r + 3.37, y / r + 2.11])
    out = []
    for k in ("square", "turbo"):
        d = Drizzle(kernel=k, out_shape=(64, 64), fillval=0.0)
        d.add_image(data, exptime=1.0, pixmap=pm, iscale=r * r, pixel_scale_ratio=r,
                    pixfrac=0.8)
        out.append(d.out_img.copy())
    assert_allclose(out[0], out[1], rtol=1e-5, atol=1e-6)


def test_flagged_pixels_excluded():
    """Pixels with an excluded DQ bit do not enter the mosaic."""
    g = Grid(nx=60, ny=60, scale=0.04, ra0=150.0, dec0=2.0)
    mg = Grid(nx=70, ny=70, scale=0.03, ra0=150.0, dec0=2.0)
    e = _noiseless(np.ones(g.shape, np.float32))
    e.sci[30, 30] = 1e6
    e.dq[30, 30] = sv.DQ_HOT
    m = sv.drizzle_mosaic([e], [g], mg, "square", 1.0)
    inside = m.wht > 0
    assert m.sci[inside].max() < 1.0  # 1 e-/s per detector pixel = 0.5625 per mosaic pixel
    assert (m.dq[~inside] & sv.MOSAIC_NO_DATA).all()


def _howell_depth(zp, npix, sky_e_s, dark_e_s, read_e, t, n_exp, nsigma):
    """Flux (e-/s) whose S/N is nsigma: Howell 2006 eq. 4.4, S/N = N* / sqrt(N* + npix (NS + ND
    + NR^2)), for n_exp exposures of t seconds (read noise per exposure)."""
    b = npix * ((sky_e_s + dark_e_s) * t * n_exp + read_e**2 * n_exp)
    k2 = nsigma**2
    n_star = 0.5 * (k2 + math.sqrt(k2 * k2 + 4 * k2 * b))
    return zp - 2.5 * math.log10(n_star / (t * n_exp))


def test_predicted_depth_matches_ccd_equation():
    """For a CDS readout the predicted depth is Howell's CCD equation."""
    det = dataclasses.replace(DetectorConfig(), n_groups=2, n_frames=1, read_noise_e=15.0)
    r, p = 0.2, 0.04
    npix = math.pi * r * r / (p * p)
    got = sv.predicted_depth(det, 600.0, 3, 27.5, 0.2, p, r)
    assert_allclose(got, _howell_depth(27.5, npix, 0.2, det.dark_e_s, 15.0, 600.0, 3, 5.0),
                    atol=1e-9)


def test_background_limited_depth_improves_with_n():
    """Background-limited depth deepens by 1.25 log10 N (Howell 2006)."""
    det = dataclasses.replace(DetectorConfig(), read_noise=False, dark_current=False)
    d1 = sv.predicted_depth(det, 1000.0, 1, 28.0, 50.0, 0.04, 0.2)
    d16 = sv.predicted_depth(det, 1000.0, 16, 28.0, 50.0, 0.04, 0.2)
    assert_allclose(d16 - d1, 1.25 * math.log10(16), atol=0.005)


def test_measured_depth_follows_noise_model():
    """Random-aperture depth of simulated blank mosaics matches the prediction and 1.25 log N."""
    det = dataclasses.replace(DetectorConfig(), ipc=False, flat=False, bad_pixels=False,
                              cosmic_rays=False, saturation=False)
    zp, sky, r = 28.0, 0.2, 0.2
    depths = {}
    for n in (1, 4):
        s = dataclasses.replace(SMALL, width_arcsec=14.0, height_arcsec=14.0, n_exposures=n)
        grids = sv.exposure_grids(s, TEL, np.random.default_rng(7))
        fixed = dt.make_fixed_pattern(grids[0].shape, det, np.random.default_rng(8))
        exps = [dt.expose(np.zeros(g.shape), sky, None, det, 1000.0, 18.0,
                          np.random.default_rng(100 + i), fixed) for i, g in enumerate(grids)]
        mg = sv.mosaic_grid(s)
        mosaic = sv.drizzle_mosaic(exps, grids, mg, "square", 0.8)
        depths[n] = sv.measured_depth(mosaic, mg, zp, r, np.random.default_rng(9))
        pred = sv.predicted_depth(det, 1000.0, n, zp, sky, TEL.pixel_scale_arcsec, r)
        # ~600 independent apertures: sigma known to ~4% (0.05 mag) with MAD. Drizzle's partial
        # overlaps at the aperture edge lower the aperture noise (sum a^2 < sum a), which makes
        # the measured depth ~0.1 mag deeper at r = 5 detector pixels (measured: +0.09, +0.10)
        assert -0.05 < depths[n] - pred < 0.2
    assert_allclose(depths[4] - depths[1], 1.25 * math.log10(4), atol=0.08)


def test_mosaic_hdus_verify():
    """Mosaic HDUs pass FITS verification and carry units and the grid's TAN WCS."""
    mg = Grid(nx=50, ny=40, scale=0.03, ra0=150.0, dec0=2.0)
    m = sv.Mosaic(sci=np.ones(mg.shape, np.float32), wht=np.ones(mg.shape, np.float32),
                  exp=np.full(mg.shape, 4000.0, np.float32), dq=np.zeros(mg.shape, np.int32))
    hdus = fits.HDUList(sv.mosaic_hdus(m, mg, band="b17", zeropoint=27.9,
                                       header={"SEED": 3}))
    hdus.verify("exception")
    assert hdus["IMAGE"].header["BUNIT"] == "electron/s"
    assert hdus["IMAGE"].header["EXPTIME"] == 4000.0
    # the mosaic flag bits under the keys the pipeline's files use and detection reads
    dq = hdus["FLAGS"].header
    assert (dq["FNODATA"], dq["FFEWEXP"], dq["FSATUR"], dq["FCRONLY"]) == (
        sv.MOSAIC_NO_DATA, sv.MOSAIC_FEW_EXPOSURES, sv.MOSAIC_SATURATED, sv.MOSAIC_CR_ONLY)
    w = WCS(hdus["IMAGE"].header)
    assert_allclose(w.all_pix2world([[3.0, 7.0]], 0), mg.wcs.all_pix2world([[3.0, 7.0]], 0),
                    rtol=0, atol=1e-12)


def test_bad_arguments_raise():
    """Bad kernels, pixfrac and mismatched lists raise ConfigError naming the key."""
    g = Grid(nx=10, ny=10, scale=0.04, ra0=150.0, dec0=2.0)
    e = _noiseless(np.ones(g.shape, np.float32))
    with pytest.raises(ConfigError, match="survey.drizzle_kernel"):
        sv.drizzle_mosaic([e], [g], g, "boxy", 0.8)
    with pytest.raises(ConfigError, match="survey.pixfrac"):
        sv.drizzle_mosaic([e], [g], g, "square", 0.0)
    with pytest.raises(ConfigError, match="exposures"):
        sv.drizzle_mosaic([e, e], [g], g, "square", 0.8)
    with pytest.raises(ConfigError, match="scene"):
        sv.sample_scene(np.zeros((5, 5)), g, g)


def test_grid_window_matches_astropy_wcs_slicing():
    """A window's WCS equals astropy's slice of the parent WCS (astropy.wcs slicing)."""
    g = Grid(nx=300, ny=200, scale=0.04, ra0=150.0, dec0=2.0, roll_deg=17.0, xi0=1.3, eta0=-0.7)
    w = g.window(40, 25, 100, 60)
    ref = g.wcs[25:85, 40:140]
    x, y = np.meshgrid([0.0, 17.5, 99.0], [0.0, 33.0, 59.0])
    assert_allclose(w.wcs.all_pix2world(x, y, 0), ref.all_pix2world(x, y, 0), atol=1e-11, rtol=0)


@pytest.mark.parametrize("roll", [0.0, 25.0])
def test_tiles_partition_mosaic_and_detector_pixels(roll):
    """Tiles cover every mosaic pixel once, each exposure window covers its tile (with room for
    a drizzle drop), and every detector pixel is owned by exactly one tile (common practice)."""
    srv = dataclasses.replace(SMALL, width_arcsec=12.0, height_arcsec=9.0, roll_deg=roll,
                              mosaic_pixel_arcsec=0.04)
    eg = sv.exposure_grids(srv, TEL, np.random.default_rng(2))
    mg, sg = sv.mosaic_grid(srv), sv.scene_grid(srv, TEL)
    tiles = sv.plan_tiles(mg, eg, sg, 100)
    hits = np.zeros(mg.shape, int)
    owned = [np.zeros(g.shape, int) for g in eg]
    for t in tiles:
        y0, y1, x0, x1 = t.mosaic
        hits[y0:y1, x0:x1] += 1
        for k, (ey0, ey1, ex0, ex1) in enumerate(t.exposures):
            owned[k][ey0:ey1, ex0:ex1] += sv.owned_pixels(t, k, mg)
            # the tile's mosaic pixel corners land inside the exposure window, 1 pixel in
            cx, cy = np.meshgrid([x0 - 0.5, x1 - 0.5], [y0 - 0.5, y1 - 0.5])
            px, py = t.egrids[k].offsets_to_pixel(*mg.pixel_to_offsets(cx, cy))
            assert px.min() > 0.5 and px.max() < t.egrids[k].nx - 1.5
            assert py.min() > 0.5 and py.max() < t.egrids[k].ny - 1.5
        # the scene window lies under every exposure window
        for g in t.egrids:
            ex, ey = np.meshgrid([-0.5, g.nx - 0.5], [-0.5, g.ny - 0.5])
            qx, qy = t.sgrid.offsets_to_pixel(*g.pixel_to_offsets(ex, ey))
            assert qx.min() >= -0.5 and qx.max() <= t.sgrid.nx - 0.5
            assert qy.min() >= -0.5 and qy.max() <= t.sgrid.ny - 0.5
    assert len(tiles) == 9 and np.all(hits == 1)
    for o in owned:
        assert np.all(o == 1)


def _numpy_box_rows(img, start, n, o, f):
    """The numpy chain sample_scene used before the fused loop (pixelops.box_sum), kept as
    the reference: strided sums of rows, zero outside the image."""
    need_lo, need_hi = start, start + o * n + 1
    pad_lo, pad_hi = max(0, -need_lo), max(0, need_hi - img.shape[0])
    a = img[max(0, need_lo):min(img.shape[0], need_hi)]
    if pad_lo or pad_hi:
        a = np.pad(a, ((pad_lo, pad_hi), (0, 0)))
    out = (1.0 - f) * a[0:o * n:o]
    for j in range(1, o):
        out += a[j:o * n:o]
    if f > 0:
        out += f * a[o:o * n + 1:o]
    return out


@pytest.mark.parametrize("o, y0, x0, fy, fx, ny, nx", [
    (3, 4, 7, 0.25, 0.6, 20, 30),      # inside, fractional edges
    (2, -3, -5, 0.0, 0.5, 40, 35),     # starts before the image (zero padding), f = 0 rows
    (4, 50, 60, 0.9, 0.1, 30, 25),     # runs past the far edges
    (1, 0, 0, 0.0, 0.0, 64, 64),       # equal scales
])
def test_box_sum_equals_the_numpy_chain_bit_for_bit(o, y0, x0, fy, fx, ny, nx):
    """pixelops.box_sum equals the rows-then-columns numpy chain in float64, cast to
    float32, exactly, for float32 and float64 scenes."""
    from simfield.pixelops import box_sum

    rng = np.random.default_rng(3)
    for img in (rng.gamma(2.0, 1.0, (150, 170)).astype(np.float32),
                rng.normal(size=(150, 170))):
        f64 = np.asarray(img, float)
        rows = _numpy_box_rows(f64, y0, ny, o, fy)
        ref = np.ascontiguousarray(_numpy_box_rows(rows.T, x0, nx, o, fx).T, dtype=np.float32)
        np.testing.assert_array_equal(box_sum(img, y0, ny, x0, nx, o, fy, fx), ref)


def test_box_sum_of_scene_plus_modes_equals_forming_it_first():
    """The exposure's PSF change added while sampling (box_sum modes=, coeffs=) equals the
    numpy chain that formed max(scene + sum_k c_k mode_k, 0) first, bit for bit, also
    where the change drives pixels below zero."""
    from simfield.pixelops import box_sum

    rng = np.random.default_rng(4)
    img = rng.gamma(2.0, 1.0, (120, 130)).astype(np.float32)
    modes = rng.normal(size=(2, 120, 130)).astype(np.float32)
    coeffs = np.array([0.7, -1.3])
    src = img.copy()
    for c, d in zip(coeffs, modes):
        src += np.float32(c) * d
    np.maximum(src, 0.0, out=src)
    assert (src == 0).sum() > 100  # the clip is exercised
    rows = _numpy_box_rows(np.asarray(src, float), 2, 50, 2, 0.3)
    ref = np.ascontiguousarray(_numpy_box_rows(rows.T, -1, 60, 2, 0.8).T, dtype=np.float32)
    np.testing.assert_array_equal(box_sum(img, 2, 50, -1, 60, 2, 0.3, 0.8, modes, coeffs), ref)
