"""Correlated read noise, reference pixels and their correction (simfield.readout)."""

import numpy as np
import pytest
from scipy import signal

from simfield.errors import ConfigError
from simfield.readout import (CorrelatedNoise, RefCorrection, ReadoutLayout, pink_coefficient,
                              pink_psd, pink_rows)
from simfield.readout.pink import STEP
from tests.conftest import make_scenario

LAYOUT = ReadoutLayout((256, 512), 4, 12, 10e-6)


def _bands(f, p, model, lo, hi, n=8):
    edges = np.geomspace(lo, hi, n + 1)
    out = []
    for a, b in zip(edges[:-1], edges[1:]):
        m = (f >= a) & (f < b)
        out.append(p[m].mean() / model[m].mean())
    return np.array(out)


def test_stream_psd_follows_the_model():
    """Welch PSD (scipy.signal.welch, Hann, averaged over 6 streams) of white + pink read noise
    follows S(f) = 2 dt sigma_w^2 + A / f within 20% in every band from 8 f_1 to Nyquist, and
    the pink part alone follows A / f up to 0.9 f_N / STEP (where the synthesis stops). Model:
    white plus 1/f noise of infrared-array outputs, Rauscher et al. 2015, PASP 127, 1144
    [from memory]."""
    lay, dt = LAYOUT, LAYOUT.dt_s
    a = pink_coefficient(lay, 2.0)
    sw = 8.5  # e- per frame, the default frame read noise (12 e- CDS / sqrt 2)
    rng = np.random.default_rng(1)
    tot, pink = [], []
    for s in range(6):
        x = pink_rows(lay, a, s, ("psd",), 0, lay.shape[0]).ravel().astype(float)
        f, p = signal.welch(x, fs=1 / dt, nperseg=4096)
        pink.append(p)
        f, p = signal.welch(x + sw * rng.standard_normal(x.size), fs=1 / dt, nperseg=4096)
        tot.append(p)
    f1 = 1 / (lay.n_samples * dt)
    ok = f > 0
    r_tot = _bands(f[ok], np.mean(tot, 0)[ok], 2 * dt * sw ** 2 + pink_psd(f[ok], a),
                   8 * f1, 0.5 / dt)
    r_pink = _bands(f[ok], np.mean(pink, 0)[ok], pink_psd(f[ok], a), 8 * f1,
                    0.9 * 0.5 / dt / STEP, 6)
    assert np.all(np.abs(r_tot - 1) < 0.2), r_tot
    assert np.all(np.abs(r_pink - 1) < 0.2), r_pink


def _noise(offset=10.0, common=2.0, own=1.5, names=("t", 0)):
    return CorrelatedNoise(LAYOUT, 7, names, common, own, offset)


def test_any_window_sees_the_same_noise():
    """Pixel-tied streams: a window cut from the whole detector equals the window drawn alone
    (tiles of a mosaic see one noise field), and the seed decides it."""
    n = _noise()
    full = n.window(0, 256, 0, 512)
    np.testing.assert_array_equal(n.window(37, 130, 101, 333), full[37:130, 101:333])
    np.testing.assert_array_equal(_noise().window(0, 256, 0, 512), full)
    assert not np.array_equal(_noise(names=("t", 1)).window(0, 256, 0, 512), full)


def test_channels_read_in_alternating_directions():
    """A noise common to all outputs appears mirrored in the odd outputs (their fast scan runs
    right to left; common practice for multi-output arrays)."""
    full = _noise(offset=0.0, own=0.0).window(0, 256, 0, 512)
    w = LAYOUT.width
    np.testing.assert_allclose(full[:, :w], full[:, 2 * w - 1:w - 1:-1], rtol=1e-6)
    np.testing.assert_allclose(full[:, :w], full[:, 2 * w:3 * w], rtol=1e-6)


@pytest.mark.parametrize("pink, limit", [(False, 0.02), (True, 0.2)])
def test_reference_pixels_remove_the_channel_offsets(pink, limit):
    """The reference-pixel step takes the per-output offsets (10 e- rms) out: the outputs' mean
    levels fall to the noise of the estimate (white noise of 2 x 4 reference rows: ~0.1 e-),
    and with 1/f noise on to what each output's own slow 1/f wander leaves (the residual the
    correction cannot remove, < 20% of the offsets)."""
    rng = np.random.default_rng(5)
    noise = _noise(offset=10.0, common=2.0 if pink else 0.0, own=1.5 if pink else 0.0)
    white = lambda y0, y1, x0, x1: 8.5 * rng.standard_normal((y1 - y0, x1 - x0))  # noqa: E731
    raw = noise.window(0, 256, 0, 512)
    corr = raw - RefCorrection(noise, white, 4, 8).window(0, 256, 0, 512)
    w = LAYOUT.width
    before = np.array([raw[4:-4, c * w:(c + 1) * w].mean() for c in range(4)])
    after = np.array([corr[4:-4, c * w:(c + 1) * w].mean() for c in range(4)])
    assert np.sqrt(np.mean(before ** 2)) > 3.0
    assert np.sqrt(np.mean(after ** 2)) < limit * np.sqrt(np.mean(before ** 2))


def test_switches_are_validated():
    """Bad readout settings are refused naming the key (ConfigError)."""
    with pytest.raises(ConfigError, match="n_channels"):
        make_scenario("detector.n_channels=0")
    with pytest.raises(ConfigError, match="reference_pixels"):
        make_scenario("detector.reference_pixels=0")
    with pytest.raises(ConfigError, match="pink_common_e"):
        make_scenario("detector.pink_common_e=-1")
    with pytest.raises(ConfigError, match="persistence_fractions"):
        make_scenario("detector.persistence_fractions=[0.001]")


def test_persistence_ghosts_of_earlier_bright_stars_are_scored(tmp_path):
    """A run with persistence on: where a bright star fell on the detector in the first
    exposure, the second exposure (same detector pixels, 3" further along the dither) shows a
    ghost in the mosaic, the truth's ARTEFACT map marks it (ARTPERSI), and the scorer names
    the false detections there 'persistence'. Ghosts are checked on empty sky only (the
    stars' places change with the galaxy draws that precede them). Release law: sum of exponentials (module
    docstring; demo amplitudes)."""
    from astropy.io import fits
    from astropy.table import Table

    from simfield.pipeline import run_scenario
    from simfield.random import stream
    from simfield.survey import exposure_grids

    sc = make_scenario("survey=quick", "survey.width_arcsec=10", "survey.height_arcsec=10",
                       "survey.n_exposures=2", "survey.dither_step_arcsec=3", "workers=1",
                       "population.star_density_arcmin2=120", "population.star_mag_min=17",
                       "population.star_mag_max=18.5", "photometry.enabled=false",
                       "photoz.enabled=false", "selection=none", "score.report=false",
                       "telescope.psf.spike_radius_arcsec=2.0",
                       "telescope.psf.core_radius_arcsec=1.0")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name == "b36"]
    sc.detection.bands = ["b36"]
    run = tmp_path / "run"
    run_scenario(sc, run)
    truth = Table.read(run / "truth.fits", hdu="SOURCES")
    stars = truth[(truth["kind"] == "star") & (truth["mag_b36"] < 18.5)]
    assert len(stars) >= 1
    g0, g1 = exposure_grids(sc.survey, sc.telescope, stream(sc.seed, "dither"))
    with fits.open(run / "mosaic_b36.fits") as m, fits.open(run / "truth_image_b36.fits") as t:
        wcs_grid = None  # the mosaic pixel of a tangent-plane offset, from the header WCS
        from astropy.wcs import WCS
        wcs_grid = WCS(m["IMAGE"].header)
        diff = m["IMAGE"].data - t["IMAGE"].data
        sig = 1 / np.sqrt(np.where(m["INVVAR"].data > 0, m["INVVAR"].data, np.inf))
        art = t["ARTEFACT"].data
        bit = t["ARTEFACT"].header["ARTPERSI"]
        scene = t["IMAGE"].data
    seen = 0
    for s in stars:
        # the star's detector pixel in exposure 0, seen on the sky in exposure 1
        px, py = g0.offsets_to_pixel(float(s["x_arcsec"]), float(s["y_arcsec"]))
        xi, eta = g1.pixel_to_offsets(np.floor(px + 0.5), np.floor(py + 0.5))
        ra, dec = g1.offsets_to_sky(xi, eta)
        mx, my = (int(round(float(v))) for v in wcs_grid.celestial.all_world2pix(ra, dec, 0))
        if not (2 <= mx < diff.shape[1] - 2 and 2 <= my < diff.shape[0] - 2):
            continue
        box = (slice(my - 1, my + 2), slice(mx - 1, mx + 2))
        if scene[box].sum() > 1.0:
            # the ghost falls on another source's light (e-/s over the box; the ghosts here
            # carry ~0.4): there the mosaic departs from the noiseless scene by a few per cent
            # to tens of per cent of that light (saturated cores, the detector pixel and the
            # drizzle drop blur the mosaic, not the scene), more than the ghost
            continue
        seen += 1
        assert (art[box] & bit).any()
        assert diff[box].sum() > 5 * np.sqrt((sig[box] ** 2).sum())
    assert seen >= 1
    fd = Table.read(run / "score" / "b36" / "false_detections.ecsv")
    assert "persistence" in set(np.asarray(fd["cause"]).astype(str))


def test_persistence_release_is_the_sum_of_exponentials():
    """The current in a later exposure is the analytic integral of E sum f_i / tau_i
    exp(-t / tau_i) over its ramp, divided by the ramp time (checked against scipy.integrate
    quad), at the stimulus's own detector pixels only."""
    from scipy.integrate import quad

    from simfield.readout import Stimulus, persistence_window

    exc = np.zeros((3, 3), np.float32)
    exc[1, 1] = 5e4
    st = [Stimulus(seq=0, y0=9, x0=19, excess=exc)]
    f, tau, t_exp, gap = [0.002, 0.001], [300.0, 3000.0], 1143.0, 60.0
    img = persistence_window(st, 2, t_exp, gap, f, tau, (0, 40, 0, 40))
    t_a = t_exp + 2 * gap  # exposure 2 starts one exposure and two gaps after 0 ends
    q = quad(lambda t: 5e4 * sum(fi / ti * np.exp(-t / ti) for fi, ti in zip(f, tau)),
             t_a, t_a + t_exp)[0]
    assert img[10, 20] == pytest.approx(q / t_exp, rel=1e-5)
    assert np.count_nonzero(img) == 1
    assert not persistence_window(st, 0, t_exp, gap, f, tau, (0, 40, 0, 40)).any()


def test_flagged_persistence_is_left_out():
    """With persistence_flagged the ghost's pixels get DQ_PERSISTENCE and zero weight
    (var_sky = 0, the drizzle's rule for pixels the reduction knows are bad)."""
    from simfield.detector import Exposure
    from simfield.readout import DQ_PERSISTENCE, apply_persistence

    z = np.zeros((4, 4), np.float32)
    e = Exposure(sci=z.copy(), var=z + 1, var_sky=z + 1, dq=np.zeros((4, 4), np.int32),
                 exptime=1.0, sky=0.0, n_cr=0)
    ghost = z.copy()
    ghost[2, 1] = 0.3
    for flagged in (False, True):
        out = apply_persistence(e, ghost, flagged)
        assert out.sci[2, 1] == pytest.approx(0.3)
        assert bool(out.dq[2, 1] & DQ_PERSISTENCE) == flagged
        assert (out.var_sky[2, 1] == 0) == flagged
        assert out.var_sky[0, 0] == 1 and out.dq[0, 0] == 0


def test_switched_off_the_exposures_are_todays(tmp_path, monkeypatch):
    """With correlated_noise, persistence and nonlinearity off the readout package is never
    called, so the exposures are exactly the white-noise ones of simfield.detector."""
    import simfield.readout as ro
    from simfield.pipeline import run_scenario

    def boom(*a, **k):
        raise AssertionError("readout called with its switches off")

    import simfield.readout.nonlinearity as nl

    for name in ("apply_readout", "readout_for", "apply_persistence", "find_stimuli"):
        monkeypatch.setattr(ro, name, boom)
    monkeypatch.setattr(nl, "window_bias", boom)
    sc = make_scenario("survey=quick", "survey.width_arcsec=4", "survey.height_arcsec=4",
                       "detector.correlated_noise=false", "detector.persistence=false",
                       "detector.nonlinearity=false", "detection.enabled=false", "score.enabled=false", "workers=1",
                       "telescope.psf.spike_radius_arcsec=2.0",
                       "telescope.psf.core_radius_arcsec=1.0")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name == "b36"]
    sc.detection.bands = ["b36"]
    run_scenario(sc, tmp_path / "run")
    assert (tmp_path / "run" / "mosaic_b36.fits").exists()


def test_nonlinearity_residual_is_the_ramp_fit_of_linearised_frames():
    """The slope bias the correction leaves equals the least-squares slope (the detector's own
    weights, Rauscher et al. 2007 estimator) fitted to frames compressed as S = Q (1 - beta Q)
    and linearised by the law's exact inverse with beta_cal, minus the true current, to 5%;
    uncorrected it is -beta f^2 sum c t^2 (a few per cent near full well)."""
    from simfield.detector import slope_weights
    from simfield.readout.nonlinearity import nonlinearity_bias, ramp_weights

    n, m, tf = 8, 4, 1000.0 / 28
    c = slope_weights(n, m, tf)
    t = (np.arange(n * m) + 1) * tf
    beta = 0.05 / 8e4
    for f in (1.0, 20.0, 60.0):  # e-/s; 60 e-/s nearly fills 80000 e- in the ramp
        q = f * t
        s_ = q * (1 - beta * q)
        for beta_cal in (beta * 1.02, 0.0):
            lin = (1 - np.sqrt(1 - 4 * beta_cal * s_)) / (2 * beta_cal) if beta_cal else s_
            fitted = float(np.sum(c * lin))
            pred = float(nonlinearity_bias(np.array(f), beta, beta_cal, ramp_weights(c, tf),
                                           corrected=beta_cal > 0))
            assert fitted - f == pytest.approx(pred, rel=0.05, abs=1e-6 * f)


def test_nonlinearity_calibration_error_is_tied_to_pixels():
    """The calibration error of a pixel is the same whichever window asks (streams per
    128-pixel detector block) and standard normal over many pixels."""
    from simfield.readout.nonlinearity import calibration_error

    rng = np.random.default_rng(2)
    ys, xs = rng.integers(40, 300, 2000), rng.integers(40, 300, 2000)
    a = calibration_error(3, 0, 0, (ys, xs))
    b = calibration_error(3, 30, 17, (ys - 30, xs - 17))
    np.testing.assert_array_equal(a, b)
    assert abs(a.mean()) < 0.1 and abs(a.std() - 1) < 0.1


@pytest.mark.parametrize("corrected", [False, True])
def test_fused_residual_equals_the_numpy_chain(corrected):
    """ExposureReadout.residual and apply_readout (one numba pass each, simfield.pixelops)
    equal, bit for bit, the numpy chain they replace: the noise window less the correction,
    times the slope factor, added to sci; var + v; var_sky + v and 0 on the reference
    pixels (reference_mask). Windows inside one output, across outputs, and on the border."""
    from simfield.detector import Exposure
    from simfield.readout import ExposureReadout, apply_readout
    from simfield.readout.refpix import reference_mask

    rng = np.random.default_rng(3)
    noise = _noise(offset=10.0, common=2.0, own=1.5)
    white = lambda y0, y1, x0, x1: 8.5 * np.random.default_rng(  # noqa: E731
        [y0, y1, x0, x1]).standard_normal((y1 - y0, x1 - x0))
    corr = RefCorrection(noise, white, 4, 8) if corrected else None
    ro = ExposureReadout(noise, corr, 4, 0.0123)
    for box in ((0, 256, 0, 512), (37, 130, 101, 333), (5, 60, 130, 250), (200, 256, 400, 512)):
        y0, y1, x0, x1 = box
        r = noise.window(*box)
        if corrected:
            r -= corr.window(*box)
        ref = (ro.slope_per_frame * r).astype(np.float32)
        res = ro.residual(*box)
        assert res.dtype == np.float32
        np.testing.assert_array_equal(res, ref)
        shape = (y1 - y0, x1 - x0)
        e = Exposure(sci=rng.normal(size=shape).astype(np.float32),
                     var=rng.random(shape).astype(np.float32),
                     var_sky=rng.random(shape).astype(np.float32),
                     dq=np.zeros(shape, np.int32), exptime=100.0, sky=0.3, n_cr=0)
        sci0 = e.sci.copy()
        got = apply_readout(e, ro, box)
        v = np.float32(ro.pixel_variance())
        sky = e.var_sky + v
        sky[reference_mask(LAYOUT.shape, 4, *box)] = 0.0
        for a, b in ((got.sci, e.sci + ref), (got.var, e.var + v), (got.var_sky, sky),
                     (got.stripes, ref)):
            assert a.dtype == np.float32
            np.testing.assert_array_equal(a, b)
        np.testing.assert_array_equal(e.sci, sci0)  # the exposure given is left as it was


def test_windows_sharing_estimates_get_the_correction_of_a_fresh_one():
    """Corrections of one exposure made for different windows share its offsets and row means
    within the process (RefCorrection's key): each window still gets exactly the correction
    a fresh object computes from the whole reference rows and columns (rows read for an
    earlier, overlapping window are reused, not read again)."""
    noise = _noise(offset=10.0, common=2.0, own=1.5)

    def white(y0, y1, x0, x1):  # a pixel's white noise depends on the pixel only
        yy, xx = np.mgrid[y0:y1, x0:x1]
        return 8.5 * np.sin(0.37 * yy * 512 + 1.3 * xx)

    reads = []

    def counted(*box):
        reads.append(box)
        return white(*box)

    key = ("test", 1)
    boxes = [(0, 100, 0, 200), (60, 180, 300, 512), (150, 256, 100, 400), (0, 100, 200, 512)]
    for box in boxes:
        shared = RefCorrection(noise, counted, 4, 8, key=key).window(*box)
        fresh = RefCorrection(noise, white, 4, 8).window(*box)
        np.testing.assert_array_equal(shared, fresh)
    # each reference row is read once: the last window's rows were all read before
    rows = sorted(r for y0, y1, x0, x1 in reads if x1 - x0 == 4 for r in range(y0, y1))
    assert len(rows) == 2 * len(set(rows))  # left and right reference columns, once each
