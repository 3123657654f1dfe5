"""Tests of simfield.detector: ramp noise, IPC, cosmic rays, saturation, flat field.

Comparison to outside sources
-----------------------------
- Up-the-ramp slope variance: Rauscher et al. 2007, PASP 119, 768, eq. 1 (written out below, not
  taken from the project), and an explicit Monte Carlo of frames done here in the test.
- CDS limit of eq. 1: 2 sigma_r^2 + f t (same paper).
- IPC: the pixel variance of white noise convolved with the 3x3 kernel falls by the sum of the
  squared kernel weights, (1 - 4 alpha)^2 + 4 alpha^2 (follows from the kernel; Donlon, Ninkov &
  Baum 2018, JATIS, for the kernel form).
- Cosmic rays: events per cm^2 per s, a few pixels each (Rauscher & Fixsen 2025, PASP 137,
  095003); counts against the Poisson expectation.
- Quantisation: uniform rounding error adds gain^2/12 per read (common practice), checked
  against quantised frames simulated here.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import ndimage

from simfield import detector as dt
from simfield.config import DetectorConfig
from simfield.errors import ConfigError

QUIET = dict(ipc=False, flat=False, bad_pixels=False, cosmic_rays=False, saturation=False,
             quantize=False, dark_current=False)


def _det(**kw) -> DetectorConfig:
    return dataclasses.replace(DetectorConfig(), **kw)


def _rauscher_eq1(f, sigma_r, n, m, t_f):
    """Rauscher et al. 2007, PASP 119, 768, eq. 1 (no dropped frames; [mem], the third term
    checked by the frame Monte Carlo below): variance of the total
    counts (e-^2) over (n-1) t_g, returned as the slope variance (e-/s)^2."""
    t_g = m * t_f
    s2 = (12.0 * (n - 1) / (m * n * (n + 1)) * sigma_r**2
          + 6.0 * (n**2 + 1) / (5.0 * n * (n + 1)) * (n - 1) * t_g * f
          - 2.0 * (m**2 - 1) * (n - 1) / (m * n * (n + 1)) * t_f * f)
    return s2 / ((n - 1) * t_g) ** 2


def _frames_monte_carlo(f, sigma_r, n, m, t_f, n_ramps, rng, gain=None):
    """Slopes fitted to explicitly simulated frames (Poisson charge, Gaussian read noise)."""
    n_frames = n * m
    charge = np.cumsum(rng.poisson(f * t_f, (n_ramps, n_frames)), axis=1).astype(float)
    frames = charge + sigma_r * rng.standard_normal((n_ramps, n_frames))
    if gain is not None:
        frames = np.round(frames / gain) * gain
    groups = frames.reshape(n_ramps, n, m).mean(axis=2)
    t = (np.arange(n) * m + (m + 1) / 2.0) * t_f
    return np.polyfit(t, groups.T, 1)[0]


@pytest.mark.parametrize("n,m", [(2, 1), (8, 4), (5, 2), (16, 1)])
def test_slope_variance_factors_match_rauscher_eq1(n, m):
    """Read and shot-noise factors of the fitted slope equal Rauscher et al. 2007 eq. 1."""
    t_f, sigma_r, f = 10.7, 9.0, 0.37
    a, b = dt.slope_variance_factors(n, m, t_f)
    assert_allclose(a * sigma_r**2 + b * f, _rauscher_eq1(f, sigma_r, n, m, t_f), rtol=1e-10)


def test_rauscher_eq1_against_frame_monte_carlo():
    """Eq. 1 of Rauscher et al. 2007 agrees with a Monte Carlo of frames (sampling error 2%)."""
    rng = np.random.default_rng(3)
    n, m, t_f, sigma_r, f = 6, 3, 20.0, 8.0, 0.8
    slopes = _frames_monte_carlo(f, sigma_r, n, m, t_f, 40000, rng)
    # relative standard error of a variance from N samples: sqrt(2/N) = 0.7%
    assert_allclose(slopes.var(), _rauscher_eq1(f, sigma_r, n, m, t_f), rtol=0.025)
    assert_allclose(slopes.mean(), f, rtol=0.01)


def _noise(kind, seed, shape):
    """A Generator or the pixel-tied noise of a window (the two noise sources of expose)."""
    if kind == "generator":
        return np.random.default_rng(seed)
    return dt.PixelNoise(seed, ("exposure", "test", 0), 37, 11, shape)


@pytest.mark.parametrize("kind", ["generator", "pixel"])
def test_expose_pixel_variance_matches_rauscher_eq1(kind):
    """Pixel variance of a flat exposure (shot + read noise only) follows Rauscher et al. eq. 1."""
    det = _det(n_groups=6, n_frames=3, read_noise_e=11.0, **QUIET)
    exptime = 500.0
    t_f = exptime / ((6 - 1) * 3)
    rate, sky = 0.3, 0.2
    shape = (600, 600)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.full(shape, rate), sky, None, det, exptime, 18.0,
                  _noise(kind, 1, shape), fixed)
    expected = _rauscher_eq1(rate + sky, 11.0 / np.sqrt(2), 6, 3, t_f)
    # 360000 pixels: variance known to sqrt(2/N) = 0.24%
    assert_allclose(e.sci.var(), expected, rtol=0.012)
    assert_allclose(e.sci.mean(), rate + sky, rtol=2e-3)
    assert_allclose(np.median(e.var), expected, rtol=1e-5)


def test_cds_limit():
    """n_groups=2, n_frames=1 gives 2 sigma_r^2 + f t (Rauscher et al. 2007, CDS limit of eq. 1)."""
    det = _det(n_groups=2, n_frames=1, read_noise_e=14.0, **QUIET)
    t, f = 300.0, 0.5
    sigma_r = 14.0 / np.sqrt(2.0)  # CDS read noise = sqrt(2) x frame read noise
    shape = (500, 500)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.full(shape, f), 0.0, None, det, t, 18.0, np.random.default_rng(2), fixed)
    expected = (2 * sigma_r**2 + f * t) / t**2
    a, b = dt.slope_variance_factors(2, 1, t)
    assert_allclose(a * sigma_r**2 + b * f, expected, rtol=1e-12)
    assert_allclose(e.sci.var(), expected, rtol=0.015)


def test_quantisation_noise_against_quantised_frames():
    """Integer-ADU readout adds gain^2/12 per frame: expose matches quantised-frame Monte Carlo."""
    gain, read_cds = 8.0, 8.0  # frame read noise 5.7 e- = 0.7 ADU: quantisation matters
    n, m, exptime, f = 4, 2, 300.0, 0.05
    t_f = exptime / ((n - 1) * m)
    det = _det(n_groups=n, n_frames=m, read_noise_e=read_cds, gain_e_adu=gain,
               **{**QUIET, "quantize": True})
    shape = (500, 500)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.full(shape, f), 0.0, None, det, exptime, 18.0, np.random.default_rng(4),
                  fixed)
    mc = _frames_monte_carlo(f, read_cds / np.sqrt(2), n, m, t_f, 100000,
                             np.random.default_rng(5), gain=gain)
    # both variances known to ~0.5%; the uniform-error model holds to ~1% down to 0.5 ADU
    assert_allclose(e.sci.var(), mc.var(), rtol=0.03)
    assert e.sci.var() > _rauscher_eq1(f, read_cds / np.sqrt(2), n, m, t_f) * 1.08


def test_ipc_lowers_pixel_variance():
    """IPC lowers the shot-noise pixel variance by (1 - 4 alpha)^2 + 4 alpha^2 (from the kernel)."""
    alpha = 0.02
    shape = (800, 800)
    out = {}
    for on in (False, True):
        det = _det(read_noise=False, ipc_alpha=alpha, **{**QUIET, "ipc": on})
        fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
        e = dt.expose(np.full(shape, 2.0), 0.0, None, det, 1000.0, 18.0,
                      np.random.default_rng(7), fixed)
        out[on] = e.sci[2:-2, 2:-2].var()
    expected = (1 - 4 * alpha) ** 2 + 4 * alpha**2
    # each variance to 0.18%: ratio to ~0.3%
    assert_allclose(out[True] / out[False], expected, rtol=0.01)


def test_apply_ipc_conserves_charge_and_matches_kernel():
    """apply_ipc equals scipy.ndimage.convolve with the 3x3 IPC kernel (zero outside)."""
    alpha = 0.013
    img = np.random.default_rng(0).random((40, 30))
    kern = np.array([[0, alpha, 0], [alpha, 1 - 4 * alpha, alpha], [0, alpha, 0]])
    ref = ndimage.convolve(img, kern, mode="constant", cval=0.0)
    assert_allclose(dt.apply_ipc(img, alpha), ref, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("kind", ["generator", "pixel"])
def test_cosmic_ray_events_follow_rate(kind):
    """Detected cosmic-ray clusters match rate x area x ramp time (Rauscher & Fixsen 2025)."""
    n, m, exptime, pix_um = 8, 4, 1000.0, 18.0
    det = _det(cosmic_ray_rate_cm2_s=0.5, **{**QUIET, "cosmic_rays": True})
    shape = (1000, 1000)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.zeros(shape), 0.2, None, det, exptime, pix_um, _noise(kind, 8, shape),
                  fixed)
    area_cm2 = shape[0] * shape[1] * (pix_um * 1e-4) ** 2
    ramp_s = n * exptime / (n - 1)  # reset to last read: n groups of t_g = exptime / (n - 1)
    expected = 0.5 * area_cm2 * ramp_s
    assert abs(e.n_cr - expected) < 4 * np.sqrt(expected)
    flagged = (e.dq & (dt.DQ_COSMIC_RAY | dt.DQ_NO_SLOPE)) != 0
    _, n_clusters = ndimage.label(flagged)
    # events in the first frame interval leave no jump (1/32 of them); a few clusters merge
    assert_allclose(n_clusters, expected * (1 - 1 / (n * m)), rtol=0.06)
    pixels_per_event = flagged.sum() / n_clusters
    assert 3 <= pixels_per_event <= 12  # "~7 pixels" (Rauscher & Fixsen 2025)


def test_cosmic_ray_pixels_keep_clean_slope():
    """Pixels with a detected jump keep an unbiased slope from their clean groups."""
    det = _det(cosmic_ray_rate_cm2_s=5.0, **{**QUIET, "cosmic_rays": True})
    shape = (600, 600)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.full(shape, 0.5), 0.0, None, det, 1000.0, 18.0, np.random.default_rng(9),
                  fixed)
    hit = (e.dq & dt.DQ_COSMIC_RAY) != 0
    good = hit & ((e.dq & dt.DQ_NO_SLOPE) == 0)
    assert 0.05 < hit.mean() < 0.2
    z = (e.sci[good] - 0.5) / np.sqrt(e.var[good])
    assert_allclose(z.mean(), 0.0, atol=0.02)
    assert_allclose(z.std(), 1.0, atol=0.03)


def test_saturation_flags_and_recovers():
    """Late saturation keeps the unsaturated groups; saturation in the first group leaves no slope."""
    det = _det(full_well_e=10000.0, **{**QUIET, "saturation": True})
    n, exptime = det.n_groups, 700.0
    t_g = exptime / (n - 1)
    rate = np.zeros((1, 3))
    rate[0, 0] = 1.0  # never saturates
    rate[0, 1] = 10000.0 / (4.5 * t_g)  # full at 4.5 group times: groups 0..3 usable
    rate[0, 2] = 10000.0 / (0.5 * t_g)  # full inside the first group
    fixed = dt.make_fixed_pattern(rate.shape, det, np.random.default_rng(0))
    e = dt.expose(rate, 0.0, None, det, exptime, 18.0, np.random.default_rng(1), fixed)
    assert e.dq[0, 0] == 0
    assert e.dq[0, 1] == dt.DQ_SATURATED
    assert e.dq[0, 2] & dt.DQ_NO_SLOPE
    a4, b4 = dt.slope_variance_factors(n, det.n_frames, dt.frame_time(det, exptime), 4)
    assert_allclose(e.var[0, 1], a4 * det.read_noise_e**2 / 2 + b4 * rate[0, 1], rtol=1e-5)
    assert abs(e.sci[0, 1] - rate[0, 1]) < 5 * np.sqrt(e.var[0, 1])


def test_flat_calibration_leaves_only_the_flat_error():
    """Without noise the calibrated image is signal / (1 + flat error) (common practice)."""
    det = _det(poisson=False, read_noise=False, flat_rms=0.05, flat_error_rms=0.004,
               **{**QUIET, "flat": True})
    shape = (300, 300)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    assert_allclose(fixed.flat.std(), 0.05, rtol=0.02)
    e = dt.expose(np.full(shape, 1.5), 0.5, None, det, 1000.0, 18.0,
                  np.random.default_rng(1), fixed)
    assert_allclose((e.sci / 2.0 - 1.0).std(), 0.004, rtol=0.03)
    exact = _det(poisson=False, read_noise=False, flat_rms=0.05, flat_error_rms=0.0,
                 **{**QUIET, "flat": True})
    fixed0 = dt.make_fixed_pattern(shape, exact, np.random.default_rng(0))
    e0 = dt.expose(np.full(shape, 1.5), 0.5, None, exact, 1000.0, 18.0,
                   np.random.default_rng(1), fixed0)
    assert_allclose(e0.sci, 2.0, rtol=1e-6)


def test_fixed_pattern_seeded_and_fractions():
    """Same seed gives the same pattern; hot/dead fractions match the configuration (binomial)."""
    det = _det(hot_pixel_fraction=1e-3, dead_pixel_fraction=2e-3)
    shape = (500, 500)
    a = dt.make_fixed_pattern(shape, det, np.random.default_rng(11))
    b = dt.make_fixed_pattern(shape, det, np.random.default_rng(11))
    assert np.array_equal(a.flat, b.flat) and np.array_equal(a.hot, b.hot)
    npix = shape[0] * shape[1]
    for mask, p in ((a.hot, 1e-3), (a.dead, 2e-3)):
        assert abs(mask.sum() - p * npix) < 4 * np.sqrt(p * npix)
    e = dt.expose(np.zeros(shape), 0.1, None, det, 500.0, 18.0, np.random.default_rng(1), a)
    assert np.all(e.dq[a.hot] & dt.DQ_HOT) and np.all(e.dq[a.dead] & dt.DQ_DEAD)


def test_same_seed_same_exposure():
    """An exposure depends only on its inputs and generator seed."""
    det = DetectorConfig()
    shape = (200, 200)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    rate = np.random.default_rng(2).exponential(0.1, shape)
    e1 = dt.expose(rate, 0.2, None, det, 1000.0, 18.0, np.random.default_rng(5), fixed)
    e2 = dt.expose(rate, 0.2, None, det, 1000.0, 18.0, np.random.default_rng(5), fixed)
    assert np.array_equal(e1.sci, e2.sci) and np.array_equal(e1.dq, e2.dq)


def test_bad_input_raises():
    """Bad arguments raise ConfigError naming the argument."""
    det = DetectorConfig()
    fixed = dt.make_fixed_pattern((10, 10), det, np.random.default_rng(0))
    with pytest.raises(ConfigError, match="exptime_s"):
        dt.expose(np.zeros((10, 10)), 0.1, None, det, 0.0, 18.0, np.random.default_rng(0), fixed)
    with pytest.raises(ConfigError, match="fixed"):
        dt.expose(np.zeros((12, 10)), 0.1, None, det, 10.0, 18.0, np.random.default_rng(0),
                  fixed)
    with pytest.raises(ConfigError, match="rate"):
        dt.expose(-np.ones((10, 10)), 0.1, None, det, 10.0, 18.0, np.random.default_rng(0),
                  fixed)


def test_fixed_pattern_window_does_not_depend_on_the_window():
    """A pixel's flat and bad-pixel values are the same whichever window asks (common practice:
    a detector's fixed pattern is a property of the pixel)."""
    det = _det(hot_pixel_fraction=1e-2, dead_pixel_fraction=1e-2)
    big = dt.fixed_pattern_window(det, 7, 100, 700, 50, 600)
    small = dt.fixed_pattern_window(det, 7, 250, 530, 300, 310)
    cut = (slice(150, 430), slice(250, 260))
    for name in ("flat", "flat_cal", "hot", "hot_dark", "dead", "dark_z"):
        assert_array_equal(getattr(small, name), getattr(big, name)[cut])
    other = dt.fixed_pattern_window(det, 8, 250, 530, 300, 310)
    assert not np.array_equal(other.flat, small.flat)
    # windows sharing the blocks made for earlier windows: the same values, blocks made once
    made = {}
    first = dt.fixed_pattern_window(det, 7, 100, 700, 50, 600, blocks=made)
    n_blocks = len(made)
    again = dt.fixed_pattern_window(det, 7, 250, 530, 300, 310, blocks=made)
    assert len(made) == n_blocks == 3 * 3
    for name in ("flat", "flat_cal", "hot", "hot_dark", "dead", "dark_z"):
        assert_array_equal(getattr(first, name), getattr(big, name))
        assert_array_equal(getattr(again, name), getattr(small, name))
    with pytest.raises(ConfigError, match="window"):
        dt.fixed_pattern_window(det, 7, 10, 10, 0, 5)


@pytest.mark.parametrize("lam", [4.0, 150.0])
def test_pixel_noise_counts_follow_poisson(lam):
    """PixelNoise counts have the Poisson mean, variance and skewness (scipy.stats.poisson):
    exact below 20 e-, Cornish-Fisher above (variance lam + 1/18)."""
    from scipy import stats

    shape = (700, 700)
    c = dt.PixelNoise(3, ("t",), 0, 0, shape).poisson(np.full(shape, lam)).astype(float)
    mean, var, skew = (float(v) for v in stats.poisson.stats(lam, moments="mvs"))
    n = c.size
    assert abs(c.mean() - mean) < 4 * np.sqrt(var / n)
    assert_allclose(c.var(), var, rtol=4 * np.sqrt(2 / n) + 1 / (18 * lam))
    assert_allclose(stats.skew(c.ravel()), skew, atol=4 * np.sqrt(6 / n))
    if lam < dt.POISSON_EXACT_BELOW:
        assert np.all(c == np.round(c))


def test_pixel_noise_windows_agree_where_they_overlap():
    """Two overlapping windows of one detector give the same exposure on their shared pixels,
    IPC, cosmic rays and jumps included, away from the window edges (common practice: noise
    belongs to the pixel; this is what keeps a tiled mosaic free of seams)."""
    det = _det(cosmic_ray_rate_cm2_s=2.0)
    rng = np.random.default_rng(4)
    full = (rng.random((420, 500)) * 2.0).astype(np.float32)
    fixed = dt.fixed_pattern_window(det, 9, 0, 420, 0, 500)

    def window(y0, y1, x0, x1):
        cut = (slice(y0, y1), slice(x0, x1))
        fp = dt.FixedPattern(**{k: getattr(fixed, k)[cut] for k in
                                ("flat", "flat_cal", "hot", "hot_dark", "dead", "dark_z")})
        return dt.expose(full[cut], 0.3, None, det, 500.0, 18.0,
                         dt.PixelNoise(9, ("exposure", "b", 0), y0, x0, (y1 - y0, x1 - x0)), fp)

    a = window(0, 300, 0, 400)
    b = window(150, 420, 250, 500)
    sa, sb = (slice(155, 295), slice(255, 395)), (slice(5, 145), slice(5, 145))
    assert_allclose(a.sci[sa], b.sci[sb], rtol=1e-5, atol=1e-6)
    assert np.array_equal(a.dq[sa], b.dq[sb])
    assert np.any(a.dq[sa] & dt.DQ_COSMIC_RAY)  # the overlap does hold cosmic-ray hits


def test_pixel_noise_window_deviates_are_those_of_whole_blocks():
    """A window's deviates are those of the whole NOISE_BLOCK^2 blocks of the pixels' own
    streams (numpy's Generator draws from each stream in a fixed order; common practice),
    normal and uniform, for windows that start and end inside blocks and at block edges."""
    from simfield.random import stream

    b = dt.NOISE_BLOCK
    for y0, x0, shape in ((37, 11, (200, 150)), (0, 0, (b, 2 * b)), (b - 1, 5, (3, b + 7))):
        noise = dt.PixelNoise(5, ("exposure", "t", 1), y0, x0, shape)
        for uniform in (False, True):
            got = noise._field("read", uniform)
            ref = np.empty(shape, np.float32)
            for y in range(y0, y0 + shape[0]):
                for bx in range(x0 // b, (x0 + shape[1] - 1) // b + 1):
                    rng = stream(5, "exposure", "t", 1, "read", y // b, bx)
                    blk = rng.random((b, b), np.float32) if uniform else \
                        rng.standard_normal((b, b), np.float32)
                    lo, hi = max(x0, bx * b), min(x0 + shape[1], (bx + 1) * b)
                    ref[y - y0, lo - x0:hi - x0] = blk[y % b, lo - bx * b:hi - bx * b]
            assert np.array_equal(got, ref), (y0, x0, shape, uniform)


def test_second_band_on_a_window_equals_a_fresh_pattern():
    """expose keeps what it derives from the fixed pattern alone (response, dark, its
    calibration, bad-pixel flags) for the next exposure of the window: a second band, and a
    change of detector settings, give bit for bit what a fresh copy of the pattern gives."""
    import dataclasses

    det = DetectorConfig()
    fixed = dt.fixed_pattern_window(det, 3, 0, 96, 0, 80)
    rate = np.random.default_rng(2).exponential(0.5, (96, 80)).astype(np.float32)

    def run(d, fp, sky, k):
        return dt.expose(rate, sky, None, d, 300.0, 18.0,
                         dt.PixelNoise(3, ("exposure", "bx", k), 0, 0, rate.shape), fp)

    run(det, fixed, 0.2, 0)  # fills the pattern's memo
    for d, sky, k in ((det, 0.7, 1), (dataclasses.replace(det, ipc=False), 0.7, 1),
                      (dataclasses.replace(det, dark_e_s=0.05), 0.3, 2)):
        fresh = dataclasses.replace(fixed, memo={})
        a, b = run(d, fixed, sky, k), run(d, fresh, sky, k)
        for name in ("sci", "var", "var_sky", "dq"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
