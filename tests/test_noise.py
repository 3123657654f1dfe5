"""Honest noise and flags: what the written mosaics say against what an outside measurement sees.

The end-to-end checks read only the written files and measure with photutils apertures (an
outside library), never with simfield's own aperture code. The noise model's parts are
compared with published formulas: Casertano et al. 2000 (AJ 120, 2747, appendix A) for the
drizzle correlation, Rauscher et al. 2007 (PASP 119, 768, eq. 1) for ramp noise.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from astropy.io import fits
from numpy.testing import assert_allclose
from photutils.aperture import CircularAperture, aperture_photometry
from scipy import ndimage

from simfield import detector as dt
from simfield import survey as sv
from simfield.pipeline import run_scenario
from simfield.random import stream
from tests.conftest import make_scenario
from tests.test_detector import QUIET, _det, _rauscher_eq1

BANDS = ("b10", "b36")


def _field(tmp, *overrides, bands=BANDS):
    """A 24" field, four exposures, two bands, no detection (seconds per run). The correlated
    read noise is off here: these checks hold the white and IPC noise statement to 10%; the
    1/f residual's statement is checked in tests/test_readout.py."""
    sc = make_scenario("survey=quick", "survey.width_arcsec=24", "survey.height_arcsec=24",
                       "survey.n_exposures=4", "detection.enabled=false", "score.enabled=false",
                       "detector.correlated_noise=false",
                       "telescope.psf.spike_radius_arcsec=2.0",
                       "telescope.psf.core_radius_arcsec=1.0", *overrides)
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name in bands]
    return sc


@pytest.fixture(scope="module", params=[0.8, 1.0], ids=["pixfrac0.8", "pixfrac1.0"])
def field(request, tmp_path_factory):
    tmp = tmp_path_factory.mktemp(f"noise{request.param}")
    sc = _field(tmp, f"survey.pixfrac={request.param}")
    run_scenario(sc, tmp / "run")
    return sc, tmp / "run"


def _stated_factor(header, r):
    """F(r) read from the header cards APNRnn / APNFnn, linearly interpolated (the README's
    rule), parsed here without simfield's reader."""
    rad = {int(m.group(1)): header[k] for k in header if (m := re.fullmatch(r"APNR(\d\d)", k))}
    fac = {int(m.group(1)): header[k] for k in header if (m := re.fullmatch(r"APNF(\d\d)", k))}
    idx = sorted(rad)
    return float(np.interp(r, [rad[i] for i in idx], [fac[i] for i in idx]))


@pytest.mark.parametrize("band", BANDS)
@pytest.mark.parametrize("radius", [3.0, 6.0])
def test_empty_aperture_noise_matches_what_the_files_say(field, band, radius):
    """Robust scatter of photutils aperture sums on IMAGE minus the truth image, in empty sky,
    agrees within 10% with F(r) sqrt(sum 1/INVVAR) from the written weight map and header."""
    sc, run = field
    with fits.open(run / f"mosaic_{band}.fits") as m, fits.open(run / f"truth_image_{band}.fits") as t:
        sci, wht = m["IMAGE"].data.astype(float), m["INVVAR"].data.astype(float)
        header = m["INVVAR"].header
        diff = sci - t["IMAGE"].data.astype(float)
        bad = (wht <= 0) | ndimage.binary_dilation(t["SEGMAP"].data > 0, iterations=4)
    var = np.where(wht > 0, 1.0 / np.where(wht > 0, wht, 1.0), 0.0)
    rng = np.random.default_rng(3)
    ny, nx = sci.shape
    pos = np.column_stack([rng.uniform(radius + 2, nx - radius - 3, 8000),
                           rng.uniform(radius + 2, ny - radius - 3, 8000)])
    hit = aperture_photometry(bad.astype(float), CircularAperture(pos, radius + 1))["aperture_sum"]
    ap = CircularAperture(pos[np.asarray(hit) == 0], radius)
    s = np.asarray(aperture_photometry(diff, ap, method="exact")["aperture_sum"])
    v = np.asarray(aperture_photometry(var, ap, method="exact")["aperture_sum"])
    assert s.size > 500
    q75, q25 = np.percentile(s, [75, 25])
    measured = (q75 - q25) / 1.349  # robust Gaussian sigma (common practice)
    stated = _stated_factor(header, radius) * np.sqrt(np.median(v))
    # ~1000-3000 partly overlapping apertures: the scatter is known to ~3-5%
    assert measured == pytest.approx(stated, rel=0.10)
    # and the correlation is real: the pixel variances alone understate it by > 15%
    assert measured > 1.15 * np.sqrt(np.median(v))


def test_run_reports_its_own_noise_check(field):
    """summary.json carries the run's own empty-sky check of the noise statement."""
    sc, run = field
    s = json.loads((run / "summary.json").read_text())
    for band in BANDS:
        checks = s["depth_ab"][band]["aperture_noise"]
        assert {round(c["radius_pix"], 1) for c in checks} >= {2.0, 10.0}
        for c in checks:
            assert c["measured_over_stated"] == pytest.approx(1.0, abs=0.15)


def test_mosaic_flags_a_few_percent_at_most(field):
    """A mosaic's flags mean something for the mosaic: at most 5% of pixels carry any flag,
    and the header names every bit."""
    sc, run = field
    for band in BANDS:
        with fits.open(run / f"mosaic_{band}.fits") as m:
            dq = m["FLAGS"].data
            h = m["FLAGS"].header
        assert (dq != 0).mean() <= 0.05
        assert {h["FNODATA"], h["FFEWEXP"], h["FSATUR"], h["FCRONLY"]} == {1, 2, 4, 8}


def test_detector_pattern_does_not_repeat_with_the_dithers(tmp_path):
    """Hot pixels (10x the default density) and their IPC neighbours leave no peaks that repeat
    at the dither offsets: peaks above 6 sigma in (IMAGE - truth) sqrt(INVVAR) at any dither
    separation are no more common than at other separations of the same length (the
    statistic that exposed detector pixels seen once per exposure)."""
    sc = _field(tmp_path, "detector.hot_pixel_fraction=1e-3", bands=("b36",))
    run_scenario(sc, tmp_path / "run")
    with fits.open(tmp_path / "run" / "mosaic_b36.fits") as m, \
            fits.open(tmp_path / "run" / "truth_image_b36.fits") as t:
        wht = m["INVVAR"].data.astype(float)
        z = (m["IMAGE"].data - t["IMAGE"].data) * np.sqrt(wht)
    pk = np.argwhere((z == ndimage.maximum_filter(z, 3)) & (z > 6) & (wht > 0))
    grids = sv.exposure_grids(sc.survey, sc.telescope, stream(sc.seed, "dither"))
    off = np.array([[g.eta0, g.xi0] for g in grids]) / sc.survey.mosaic_pixel_arcsec
    # separations between dither positions, as (dy, dx) mosaic pixels (xi east = -x)
    seps = {(int(round(a[0] - b[0])), int(round(b[1] - a[1]))) for a in off for b in off
            if not np.allclose(a, b)}
    d = (pk[:, None, :] - pk[None, :, :]).reshape(-1, 2)
    at_dither = sum(int(np.sum(np.all(np.abs(d - s) <= 1, axis=1))) for s in seps)
    # 64 hot pixels x 4 neighbours x 4 exposures would give hundreds of such pairs
    assert at_dither <= max(4, 0.02 * len(pk)), (len(pk), at_dither)


def test_casertano_large_area_factor():
    """For white noise and nine dithers with well-spread sub-pixel phases, the large-area noise
    factor of the drizzled mosaic is Casertano et al. (2000, appendix A) R = 1/(1 - r/3),
    r = pixfrac x (input pixel / output pixel), within 3% (the formula averages over random
    phases; nine phases leave ~1-2%)."""
    for p in (0.6, 0.8, 1.0):
        sc = make_scenario("survey=quick", "survey.n_exposures=9", f"survey.pixfrac={p}")
        mg = sv.mosaic_grid(sc.survey)
        eg = sv.exposure_grids(sc.survey, sc.telescope, stream(1, "dither"))
        cw, cc = sv.drizzle_noise_covariance(eg, mg, "square", p, 0.0, np.random.default_rng(1))
        nc = sv.noise_correlation(cw, cc, 1.0, 0.0)
        assert nc.factor_inf == pytest.approx(1.0 / (1.0 - p / 3.0), rel=0.03)
        assert np.all(np.diff(nc.factors) > 0) and nc.factors[-1] < nc.factor_inf * 1.01


def test_sky_noise_terms_are_the_exposure_variance():
    """white + charge x (1 - 4a)^2 + 4a^2 (the IPC-kept share) is the variance expose() states
    for a source-free pixel of flat response."""
    det = _det(flat=False, bad_pixels=False, cosmic_rays=False, saturation=False)
    shape = (40, 40)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.zeros(shape), 0.2, None, det, 1000.0, 18.0, np.random.default_rng(1), fixed)
    w, c, a = dt.sky_noise_terms(det, 1000.0, 0.2)
    assert_allclose(np.median(e.var_sky), w + c * ((1 - 4 * a) ** 2 + 4 * a ** 2), rtol=1e-5)


def test_calibration_dark_noise_is_in_the_variance():
    """Subtracting a dark made of N dark ramps adds one dark ramp's variance / N (Rauscher et
    al. 2007 eq. 1 at the dark rate, over N) to every pixel; measured over 250,000 pixels."""
    n, m, t, read, dark, sky = 6, 3, 500.0, 11.0, 0.5, 0.2
    det = _det(n_groups=n, n_frames=m, read_noise_e=read, **{**QUIET, "dark_current": True},
               dark_e_s=dark, dark_cal_ramps=2)
    shape = (500, 500)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.zeros(shape), sky, None, det, t, 18.0, np.random.default_rng(1), fixed)
    t_f = t / ((n - 1) * m)
    expected = _rauscher_eq1(sky + dark, read / np.sqrt(2), n, m, t_f) \
        + _rauscher_eq1(dark, read / np.sqrt(2), n, m, t_f) / 2
    assert_allclose(e.sci.var(), expected, rtol=0.015)
    assert_allclose(np.median(e.var), expected, rtol=1e-4)
    assert_allclose(e.sci.mean(), sky, atol=3 * np.sqrt(expected / e.sci.size))


def test_flat_error_is_in_the_variance():
    """A calibration flat wrong by epsilon ~ N(0, s) leaves -epsilon x signal: variance
    (s x signal)^2 on top of the ramp noise (common practice), measured on a bright sky."""
    det = _det(**{**QUIET, "flat": True}, flat_rms=0.0, flat_error_rms=0.03)
    shape, sky, t = (500, 500), 5.0, 1000.0
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.zeros(shape), sky, None, det, t, 18.0, np.random.default_rng(2), fixed)
    t_f = t / ((det.n_groups - 1) * det.n_frames)
    expected = _rauscher_eq1(sky, det.read_noise_e / np.sqrt(2), det.n_groups, det.n_frames,
                             t_f) + (0.03 * sky) ** 2
    assert_allclose(e.sci.var(), expected, rtol=0.02)
    assert_allclose(np.median(e.var), expected, rtol=2e-3)


def test_hot_pixel_neighbours_flagged_and_dark_removed():
    """A reduction subtracts its calibration dark (the hot pixel's dark spread by IPC included)
    and flags the bad pixels' four neighbours: their mean is the sky again."""
    det = _det(**{**QUIET, "dark_current": True, "bad_pixels": True, "ipc": True},
               hot_pixel_fraction=0.01, dead_pixel_fraction=0.0, hot_dark_e_s=20.0)
    shape = (300, 300)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.zeros(shape), 0.2, None, det, 1000.0, 18.0, np.random.default_rng(3), fixed)
    near = ndimage.binary_dilation(fixed.hot) & ~fixed.hot
    assert np.all(e.dq[near] & dt.DQ_BAD_NEIGHBOUR)
    assert np.all(dt.DQ_EXCLUDE & dt.DQ_BAD_NEIGHBOUR)
    # without the calibration dark they would sit alpha x 20-2000 e-/s above the sky
    sigma = np.sqrt(np.median(e.var[near]) / near.sum())
    assert abs(e.sci[near].mean() - 0.2) < 4 * sigma


def test_drizzle_flags_saturation_and_missing_data():
    """Pixels saturated in the first group of every exposure have no data in the mosaic and
    says so (no data, saturated); one left out of three of four exposures is saturated and
    rests on few exposures; a repaired cosmic ray in every contributing exposure is flagged."""
    sc = make_scenario("survey=quick", "survey.n_exposures=4", "survey.pixfrac=1.0")
    mg = sv.mosaic_grid(sc.survey)
    eg = sv.exposure_grids(sc.survey, sc.telescope, stream(1, "dither"))
    exps = []
    for k, g in enumerate(eg):
        dq = np.zeros(g.shape, np.int32)
        for y, x, bits in ((100, 100, dt.DQ_SATURATED | dt.DQ_NO_SLOPE),
                           (200, 200, dt.DQ_SATURATED | (dt.DQ_NO_SLOPE if k < 3 else 0)),
                           (300, 300, dt.DQ_COSMIC_RAY)):
            xi, eta = mg.pixel_to_offsets(np.array([x]), np.array([y]))
            ex, ey = g.offsets_to_pixel(xi, eta)
            iy, ix = int(round(ey[0])), int(round(ex[0]))
            # a saturated star core: the 3x3 block around the pixel, so no drop reaches it
            dq[iy - 1:iy + 2, ix - 1:ix + 2] = bits
        v = np.ones(g.shape, np.float32)
        exps.append(dt.Exposure(sci=np.zeros(g.shape, np.float32), var=v, var_sky=v, dq=dq,
                                exptime=100.0, sky=0.0, n_cr=0))
    m = sv.drizzle_mosaic(exps, eg, mg, "square", 1.0)
    assert m.dq[100, 100] & sv.MOSAIC_NO_DATA and m.dq[100, 100] & sv.MOSAIC_SATURATED
    assert m.wht[100, 100] == 0
    assert m.dq[200, 200] & sv.MOSAIC_SATURATED and m.dq[200, 200] & sv.MOSAIC_FEW_EXPOSURES
    assert not m.dq[200, 200] & sv.MOSAIC_NO_DATA
    assert m.dq[300, 300] & sv.MOSAIC_CR_ONLY
    assert (m.dq != 0).sum() < 60  # nothing else flagged (3 blocks of ~3x3 to 4x4)


def _same_numbers(a, b, path=""):
    """Every number, string and list of two summaries equal; floats to the rounding of the
    float32 images (relative 1e-6; empty-aperture noise sums and PSF-matched fluxes add up
    in another order when tiled), depths to 1e-4 mag as before."""
    if isinstance(a, dict):
        assert sorted(a) == sorted(b), path
        for k in a:
            _same_numbers(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            _same_numbers(x, y, f"{path}[{i}]")
    elif isinstance(a, float):
        tol = 1e-4 if path.startswith(".depth_ab") else 1e-6
        assert a == pytest.approx(b, rel=1e-6, abs=tol, nan_ok=True), path
    else:
        assert a == b, path


def test_reported_numbers_do_not_depend_on_the_tiling(tmp_path):
    """Every number summary.json reports (depths, the noise check, detections, photometry,
    photometric redshifts, scores, selections) is the same for 128-pixel tiles and one tile,
    and with one or two workers (README: nothing depends on the tiling). The report pages
    are off: they draw what summary.json holds (tests/test_report.py checks them). A 12"
    field: 300 mosaic pixels a side, 3 x 3 tiles of 128; the small PSFs of the other end-to-end
    tests (their 2" wings still reach across a seam)."""
    out = {}
    for name, ov in (("one", ("workers=1",)), ("tiled", ("survey.tile_pixels=128", "workers=2"))):
        sc = make_scenario("survey=quick", "survey.width_arcsec=12", "survey.height_arcsec=12",
                           "telescope.psf.spike_radius_arcsec=2.0",
                           "telescope.psf.core_radius_arcsec=1.0",
                           "score.report=false", "selection.report=false", *ov)
        res = run_scenario(sc, tmp_path / name)
        s = dict(res.summary)
        s.pop("timings_s")
        s.pop("provenance", None)  # the configuration, tiling and workers included
        s["photoz"].pop("fit_time_s")  # wall time of the fit
        for band in s["score"].values():  # paths into each run's own folder
            band.pop("catalog"), band.pop("report", None)
        for sample in s["selection"].values():
            sample.pop("report", None)
        out[name] = json.loads(json.dumps(s, default=float))
    assert sum(out["one"]["detections"].values()) > 0 and out["one"]["selection"]
    _same_numbers(out["one"], out["tiled"])


def test_detections_carry_the_flags_of_their_footprint():
    """A source whose footprint holds a saturated pixel says so in its ``flags`` column (no
    silent flux loss); a clean source has flags 0."""
    from astropy.wcs import WCS

    from simfield.config import DetectionConfig
    from simfield.detect import detect_sources
    from simfield.grid import Grid

    g = Grid(nx=120, ny=120, scale=0.04, ra0=150.0, dec0=2.0)
    yy, xx = np.mgrid[0:120, 0:120]
    sci = sum(5.0 * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * 2.0 ** 2))
              for x, y in ((30, 30), (90, 90)))
    sci = sci + np.random.default_rng(0).normal(0, 0.01, sci.shape)
    flags = np.zeros(sci.shape, np.int32)
    flags[30, 30] = sv.MOSAIC_SATURATED
    det = detect_sources(sci, np.full(sci.shape, 1e4), WCS(g.wcs.to_header()), DetectionConfig(),
                         0.2, 28.0, 0.04, flags=flags).catalog
    assert len(det) == 2
    near = np.hypot(det["x"] - 30, det["y"] - 30) < 3
    assert det["flags"][near][0] == sv.MOSAIC_SATURATED and det["flags"][~near][0] == 0
