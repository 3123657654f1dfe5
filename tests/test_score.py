"""Tests of simfield.score: matching, intervals, fits, volumes, catalogue checks, a full run.

Comparison to other codes: astropy.coordinates.search_around_sky (matching), astropy.stats.
binom_conf_interval and scipy.stats.beta (intervals), scipy.stats.poisson (counts), astropy.
cosmology comoving_volume (volumes), scipy.integrate.quad (Schechter integrals).
"""

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord, search_around_sky
from astropy.io import fits
from astropy.stats import binom_conf_interval
from astropy.table import Table
from numpy.testing import assert_allclose, assert_array_equal
from scipy import integrate, stats

from simfield.config import ScoreConfig
from simfield.cosmo import default_cosmology
from simfield.errors import CatalogError
from simfield.grid import Grid
from simfield.score import metrics, volume
from simfield.score.match import match_sky
from simfield.score.run import load_catalog, score_main_args, score_run


# ------------------------------------------------------------------------------ matching
def _greedy_reference(it, idd, sep):
    """Sequential greedy walk over astropy's candidate pairs sorted by separation."""
    taken_t, taken_d, pairs = set(), set(), set()
    for k in np.lexsort((idd, it, sep)):
        if it[k] not in taken_t and idd[k] not in taken_d:
            taken_t.add(it[k])
            taken_d.add(idd[k])
            pairs.add((int(it[k]), int(idd[k])))
    return pairs


def test_match_equals_greedy_walk_over_astropy_candidates():
    """Pairs equal a sequential greedy walk over astropy search_around_sky candidates, and the
    separations equal astropy's great-circle separations."""
    rng = np.random.default_rng(3)
    n = 2000
    ra_t = 150 + rng.uniform(-0.01, 0.01, n)
    de_t = 2 + rng.uniform(-0.01, 0.01, n)
    ra_d = np.concatenate([ra_t[:1500] + rng.normal(0, 0.1 / 3600, 1500),
                           150 + rng.uniform(-0.01, 0.01, 700)])
    de_d = np.concatenate([de_t[:1500] + rng.normal(0, 0.1 / 3600, 1500),
                           2 + rng.uniform(-0.01, 0.01, 700)])
    r = 0.6
    m = match_sky(ra_t, de_t, ra_d, de_d, r)
    ct, cd = SkyCoord(ra_t * u.deg, de_t * u.deg), SkyCoord(ra_d * u.deg, de_d * u.deg)
    it, idd, sep, _ = search_around_sky(ct, cd, r * u.arcsec)
    ref = _greedy_reference(it, idd, sep.arcsec)
    assert set(zip(m.truth_index.tolist(), m.det_index.tolist())) == ref
    assert len(ref) > 1400
    # tangent-plane distances vs great circle: < 1e-6 arcsec at these separations
    assert_allclose(m.separation, ct[m.truth_index].separation(cd[m.det_index]).arcsec,
                    rtol=0, atol=1e-6)


def test_match_is_deterministic_under_permutation():
    """The same positions in another row order give the same pairs."""
    rng = np.random.default_rng(4)
    ra = 10 + rng.uniform(0, 0.005, 500)
    de = -5 + rng.uniform(0, 0.005, 500)
    rd = ra + rng.normal(0, 0.2 / 3600, 500)
    dd = de + rng.normal(0, 0.2 / 3600, 500)
    a = match_sky(ra, de, rd, dd, 0.5, 10.0, -5.0)
    p = rng.permutation(500)
    b = match_sky(ra, de, rd[p], dd[p], 0.5, 10.0, -5.0)
    assert_array_equal(a.truth_index, b.truth_index)
    assert_array_equal(p[b.det_index], a.det_index)


# ------------------------------------------------------------------------------ intervals, fits
def test_beta_interval_is_the_jeffreys_interval_of_astropy_and_scipy():
    """Jeffreys intervals (Brown, Cai & DasGupta 2001, Stat. Sci. 16, 101, sec. 4.1.2) equal
    scipy.stats.beta quantiles of Beta(k+1/2, n-k+1/2) inside, 0 at k = 0 and 1 at k = n, as
    astropy binom_conf_interval(interval='jeffreys') gives them."""
    k = np.array([0, 1, 1, 5, 9, 10, 37, 3])
    n = np.array([10, 1, 10, 10, 10, 10, 50, 3])
    lo, hi = metrics.beta_interval(k, n, 0.683)
    ref = binom_conf_interval(k, n, confidence_level=0.683, interval="jeffreys")
    assert_allclose(lo, ref[0], rtol=1e-10, atol=1e-12)
    assert_allclose(hi, ref[1], rtol=1e-10, atol=1e-12)
    inner = (k > 0) & (k < n)
    assert_allclose(lo[inner], stats.beta.ppf(0.1585, k[inner] + 0.5, n[inner] - k[inner] + 0.5),
                    rtol=1e-12)
    assert_allclose(hi[inner], stats.beta.ppf(0.8415, k[inner] + 0.5, n[inner] - k[inner] + 0.5),
                    rtol=1e-12)
    # k = n = 1: completeness 1.0 lies inside its interval, which reaches 1
    assert hi[1] == 1.0 and lo[1] < 1.0 and lo[0] == 0.0
    assert np.all((lo <= k / n) & (k / n <= hi))


def test_report_error_bars_reach_the_point_at_k_equal_n():
    """The plotted bars run from fraction_lo to fraction_hi, so at k = n the bar ends at the
    point (1.0), and at k = 0 it starts at 0."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from simfield.score.report import _plot_fraction

    t = metrics.binned_fraction([1.0, 2.0, 2.2, 3.0], [True, True, False, False], [0.5, 1.5, 2.5,
                                                                                  3.5], name="m")
    fig, ax = plt.subplots()
    cont = _plot_fraction(ax, np.asarray(t["m_mid"]), t, np.ones(3, bool), "k", None)
    seg = np.array(cont.lines[2][0].get_segments())  # one vertical segment per point
    plt.close(fig)
    assert_allclose(seg[:, 0, 1], t["fraction_lo"], rtol=0, atol=1e-12)
    assert_allclose(seg[:, 1, 1], t["fraction_hi"], rtol=0, atol=1e-12)
    assert seg[0, 1, 1] == 1.0 and t["fraction"][0] == 1.0 and seg[2, 0, 1] == 0.0


@pytest.mark.parametrize("model", ["logistic", "erf"])
def test_completeness_fit_recovers_simulated_bernoulli_parameters(model):
    """ML fit of simulated Bernoulli data (Fleming et al. 1995, AJ 109, 1044 forms) recovers
    the input plateau, transition and width within 4 sigma of its own errors."""
    rng = np.random.default_rng(11)
    mag = rng.uniform(24, 31, 6000)
    c0, mt, w = 0.95, 28.3, 0.35
    u_ = (mag - mt) / w
    p = c0 / (1 + np.exp(u_)) if model == "logistic" else 0.5 * c0 * \
        stats.norm.sf(u_) * 2
    det = rng.random(mag.size) < p
    f = metrics.fit_completeness(mag, det, model)
    err = np.sqrt(np.diag(f.cov))
    assert abs(f.c0 - c0) < 4 * err[0]
    assert abs(f.m_t - mt) < 4 * err[1]
    assert abs(f.width - w) < 4 * err[2]
    # 50% limit: solve C(m) = 0.5 of the input curve with scipy's root finder
    from scipy.optimize import brentq
    curve = (lambda m: c0 / (1 + np.exp((m - mt) / w)) - 0.5) if model == "logistic" else \
        (lambda m: c0 * stats.norm.sf((m - mt) / w) - 0.5)
    assert abs(f.m50 - brentq(curve, 24, 31)) < 4 * f.m50_err
    assert 0 < f.m50_err < 0.1


def test_completeness_fit_errors_scale_with_sample_size():
    """Fit errors shrink roughly as 1/sqrt(N) (Fisher information of Bernoulli trials)."""
    rng = np.random.default_rng(2)
    errs = []
    for n in (1000, 16000):
        mag = rng.uniform(24, 31, n)
        det = rng.random(n) < 1 / (1 + np.exp((mag - 28) / 0.3))
        errs.append(metrics.fit_completeness(mag, det).m50_err)
    assert_allclose(errs[0] / errs[1], 4.0, rtol=0.35)


# ------------------------------------------------------------------------------ volumes
def test_binned_deviance_equals_scipy_binomial_likelihood_ratio():
    """D = 2 [ln L(saturated) - ln L(model)] with scipy.stats.binom log-pmfs per bin
    (Wilks 1938, Ann. Math. Stat. 9, 60; McCullagh & Nelder 1989, sec. 4.4.3)."""
    rng = np.random.default_rng(8)
    mag = rng.uniform(25, 30, 400)
    det = rng.random(400) < 1 / (1 + np.exp((mag - 27.5) / 0.4))
    curve = lambda m: 0.9 / (1 + np.exp((m - 27.3) / 0.5))  # noqa: E731
    edges = metrics.gof_bins(mag)
    dev, nb = metrics.binned_deviance(mag, det, curve, edges)
    b = np.clip(np.digitize(mag, edges) - 1, 0, len(edges) - 2)
    n = np.bincount(b)
    k = np.bincount(b, weights=det).astype(int)
    e = np.bincount(b, weights=curve(mag))
    ref = 2 * np.sum(stats.binom.logpmf(k, n, k / n) - stats.binom.logpmf(k, n, e / n))
    assert nb == len(edges) - 1 and n.min() >= metrics.BIN_MIN_N
    assert_allclose(dev, ref, rtol=1e-10)


def test_fit_p_values_of_true_model_rarely_reject():
    """Samples drawn from a logistic curve pass the goodness-of-fit test: at most 2 of 30 fall
    below FIT_P_MIN = 0.01 (binomial probability of 3 or more at a calibrated 1% is 0.003;
    the deviance's chi2 law, Wilks 1938, is conservative where bins expect few detections)."""
    rng = np.random.default_rng(1)
    p = []
    for _ in range(30):
        m = rng.uniform(24, 31, 800)
        d = rng.random(m.size) < 0.95 / (1 + np.exp((m - 28) / 0.35))
        p.append(metrics.fit_completeness(m, d).p_value)
    assert np.sum(np.asarray(p) < metrics.FIT_P_MIN) <= 2


def test_fit_that_does_not_describe_the_data_quotes_no_limit():
    """A curve that drops to 0 at 26-27 and comes back to 0.8 at 27-29 (a lensed field's
    shape) fails the deviance test (chi2 p < 0.01); m50 and m90 are null with the reason."""
    rng = np.random.default_rng(4)
    m = rng.uniform(23, 29, 1500)
    p = np.where(m < 26, 0.97, np.where(m < 27, 0.02, 0.8))
    f = metrics.fit_completeness(m, rng.random(m.size) < p)
    assert f.p_value < 1e-6 and not f.describes_data
    d = f.as_dict()
    assert d["m50"] is None and d["m50_err"] is None and "does not describe" in d["m50_reason"]
    assert d["m90"] is None and "does not describe" in d["m90_reason"]
    json.dumps(d, allow_nan=False)


def test_limit_outside_the_data_or_too_uncertain_is_not_quoted():
    """Sources only fainter than the 90% point: m90 is not bracketed by the data; a plateau
    just above 0.9 from 150 sources gives an m90 error beyond 0.5 mag; m50 of a well sampled
    curve is quoted."""
    rng = np.random.default_rng(6)
    m = rng.uniform(27.5, 31, 1500)
    f = metrics.fit_completeness(m, rng.random(m.size) < 0.97 / (1 + np.exp((m - 28) / 0.3)))
    assert f.describes_data and np.isfinite(f.m50) and f.m50_reason is None
    assert np.isnan(f.m90) and "do not bracket 0.9" in f.m90_reason
    # plateau 0.9: m90 is either not reached, or quoted within 0.5 mag, or refused for its error
    reasons = []
    for seed in range(10):
        rng = np.random.default_rng(seed)
        m = rng.uniform(24, 31, 400)
        f = metrics.fit_completeness(m, rng.random(m.size) < 0.9 / (1 + np.exp((m - 28) / 0.35)))
        assert (f.m90_reason is None) == np.isfinite(f.m90)
        assert f.m90_reason is not None or f.m90_err <= metrics.LIMIT_ERR_MAX
        reasons.append(f.m90_reason or "")
    assert any("exceeds 0.5 mag" in r for r in reasons)


def test_veff_of_perfect_detector_equals_astropy_comoving_volume():
    """p = 1: V_eff = [V_c(z2) - V_c(z1)] x area / (4 pi sr) (Hogg 1999 eq. 29, astropy)."""
    area = 3600.0 * 4  # 4 arcmin^2 in arcsec^2
    z = np.linspace(6.0, 8.0, 801)
    v = volume.effective_volume([-20.0, -18.0], z, lambda m, zz: np.ones_like(m), area)
    c = default_cosmology()
    sr = area * (np.pi / 180 / 3600) ** 2
    ref = (c.comoving_volume(8.0) - c.comoving_volume(6.0)).value * sr / (4 * np.pi)
    assert_allclose(v, ref, rtol=1e-5)


def test_veff_behind_uniform_lens_shrinks_area_and_deepens():
    """Uniform |mu| = 4 (Bouwens et al. 2015 sec. 3 / source-plane area = image area / mu):
    a step detector at m < 28 behaves like area/4 with a limit 2.5 log10(4) mag deeper."""
    z = np.linspace(5.0, 9.0, 401)
    step = (lambda m, zz: (m < 28.0).astype(float))
    deeper = (lambda m, zz: (m < 28.0 + 2.5 * np.log10(4.0)).astype(float))
    M = np.array([-21.0, -19.0, -17.5])
    v_lens = volume.effective_volume(M, z, step, magnification=np.full(100, 4.0),
                                     pixel_area_arcsec2=1.0)
    v_ref = volume.effective_volume(M, z, deeper, area_arcsec2=25.0)
    assert_allclose(v_lens, v_ref, rtol=1e-9)


def test_expected_number_matches_quad_of_schechter_and_astropy_volume():
    """N(z > 7) for p = 1 equals the Schechter (1976, ApJ 203, 297) integral by scipy quad
    times the astropy comoving volume."""
    ms, ps, al = -20.9, 4.7e-4, -1.9
    M = np.linspace(-23.0, -17.0, 2001)
    z = np.linspace(6.0, 9.0, 601)
    area = 3600.0
    n = volume.expected_number(M, z, lambda m, zz: np.ones_like(m), ms, ps, al,
                               area_arcsec2=area, z_min=7.0)
    phi = (lambda x: 0.4 * np.log(10) * ps * 10 ** (-0.4 * (x - ms) * (al + 1))
           * np.exp(-10 ** (-0.4 * (x - ms))))
    dens = integrate.quad(phi, -23.0, -17.0)[0]
    c = default_cosmology()
    vol = (c.comoving_volume(9.0) - c.comoving_volume(7.0)).value * \
        area * (np.pi / 180 / 3600) ** 2 / (4 * np.pi)
    assert_allclose(n, dens * vol, rtol=1e-4)


def test_poisson_probabilities_match_scipy():
    """P(N <= n) and P(N >= n) equal scipy.stats.poisson cdf / sf."""
    lam = np.array([0.5, 3.2, 12.0])
    assert_allclose(volume.poisson_at_most(0, lam), np.exp(-lam), rtol=1e-12)
    assert_allclose(volume.poisson_at_most(4, lam), stats.poisson.cdf(4, lam), rtol=1e-12)
    assert_allclose(volume.poisson_at_least(4, lam), 1 - stats.poisson.cdf(3, lam), rtol=1e-10)


# ------------------------------------------------------------------------------ a synthetic run
ZP = 28.0
BAND = "b17"


def _make_run(path, seed=5):
    """Small run directory: Gaussian galaxies, one bright star with four spikes, noise."""
    rng = np.random.default_rng(seed)
    g = Grid(nx=300, ny=300, scale=0.03, ra0=150.0, dec0=2.0)
    n = 80
    x = rng.uniform(15, 285, n)
    y = rng.uniform(15, 285, n)
    mag = rng.uniform(24.0, 31.0, n)
    rh = rng.uniform(0.04, 0.15, n)
    kind = np.array(["galaxy"] * n)
    x[0], y[0], mag[0], rh[0], kind[0] = 150.0, 150.0, 19.5, 0.0, "star"
    yy, xx = np.mgrid[0:300, 0:300]
    img = np.zeros((300, 300))
    segm = np.zeros((300, 300), np.int32)
    best = np.zeros((300, 300))
    psf_sig = 0.06 / 0.03 / 2.3548
    noise = 0.002
    for i in range(n):
        # Gaussian: r_half = 1.1774 sigma; observed sigma^2 = intrinsic^2 + PSF^2
        s2 = (rh[i] / 1.1774 / 0.03) ** 2 + psf_sig**2
        f = 10 ** (-0.4 * (mag[i] - ZP))
        prof = f / (2 * np.pi * s2) * np.exp(-((xx - x[i]) ** 2 + (yy - y[i]) ** 2) / (2 * s2))
        img += prof
        own = (prof > noise) & (prof > best)
        segm[own] = i + 1
        best = np.maximum(best, prof)
    # spikes of the star along the x and y axes
    f0 = 10 ** (-0.4 * (mag[0] - ZP))
    for ax_ in (np.abs(yy - 150) < 1, np.abs(xx - 150) < 1):
        r = np.hypot(xx - 150, yy - 150) + 3
        img += np.where(ax_ & (r < 40), 0.02 * f0 / r**2, 0)
    sci = img + rng.normal(0, noise, img.shape)
    wht = np.full(img.shape, noise**-2)
    dq = np.zeros(img.shape, np.int32)
    dq[20:23, 250:253] = 4
    sci[20:23, 250:253] += 1.0  # an artefact, flagged
    hdr = g.wcs.to_header()
    hdr["ZP_AB"], hdr["EXPTIME"], hdr["BUNIT"] = ZP, 1e4, "electron/s"
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(sci.astype(np.float32), hdr, "IMAGE"),
                  fits.ImageHDU(wht.astype(np.float32), hdr, "INVVAR"),
                  fits.ImageHDU(dq, hdr, "FLAGS")]).writeto(path / f"mosaic_{BAND}.fits")
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(img.astype(np.float32), hdr, "IMAGE"),
                  fits.ImageHDU(segm, hdr, "SEGMAP")]).writeto(path / f"truth_image_{BAND}.fits")
    py, px = np.mgrid[-40:41, -40:41]
    # Gaussian core, r^-3 diffraction halo (Born & Wolf sec. 8.5 envelope), spikes on the axes
    psf = np.exp(-(px**2 + py**2) / (2 * psf_sig**2)) + 1e-3 / (np.hypot(px, py) + 3) ** 3 + \
        np.where((np.abs(px) < 1) | (np.abs(py) < 1), 1e-2 / (np.hypot(px, py) + 3) ** 2, 0)
    ph = fits.ImageHDU(psf / psf.sum(), name="PSF_WIDE")
    ph.header["PIXSCALE"], ph.header["FWHM"] = 0.03, 0.06
    pd = fits.ImageHDU(psf / psf.sum(), name="PSF_DET")
    pd.header["PIXSCALE"], pd.header["FWHM"] = 0.03, 0.06
    fits.HDUList([fits.PrimaryHDU(), ph, pd]).writeto(path / f"psf_{BAND}.fits")
    ra, dec = g.pixel_to_sky(x, y)
    src = Table({"id": np.arange(1, n + 1), "kind": kind, "ra": ra, "dec": dec, "x": x, "y": y,
                 "redshift": rng.uniform(1, 9, n), "abs_mag_uv": rng.uniform(-22, -16, n),
                 f"mag_{BAND}": mag, "r_half": rh, "sersic_n": np.full(n, 0.5),
                 "axis_ratio": np.ones(n), "position_angle": np.zeros(n),
                 "magnification": np.ones(n), "n_images": np.ones(n, int)})
    ims = Table({"image_id": np.arange(1, n + 1), "source_id": src["id"], "ra": ra, "dec": dec,
                 "x": x, "y": y, "magnification": np.ones(n), f"mag_{BAND}": mag})
    fits.HDUList([fits.PrimaryHDU(), fits.table_to_hdu(src), fits.table_to_hdu(ims)]) \
        .writeto(path / "truth.fits")
    with fits.open(path / "truth.fits", mode="update") as hl:
        hl[1].name, hl[2].name = "SOURCES", "IMAGES"
    (path / "COMPLETE").write_text("a finished run\n")  # as simfield leaves one
    return g, sci, wht, src


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    """A synthetic run directory and a detection catalogue from the baseline detector."""
    from simfield.config import DetectionConfig
    from simfield.detect import detect_sources

    path = tmp_path_factory.mktemp("run")
    g, sci, wht, src = _make_run(path)
    d = detect_sources(sci, wht, g.wcs, DetectionConfig(), 0.06, ZP, 0.03)
    cat = d.catalog
    # a fake detection far from any source: must be classified as noise
    extra = Table({"ra": [g.pixel_to_sky(5.0, 290.0)[0]], "dec": [g.pixel_to_sky(5.0, 290.0)[1]],
                   "mag": [29.5]})
    t = Table({"ra": np.concatenate([cat["ra"], extra["ra"]]),
               "dec": np.concatenate([cat["dec"], extra["dec"]]),
               "mag": np.concatenate([cat["mag"], extra["mag"]])})
    t = t[np.isfinite(t["mag"])]
    t.write(path / "cat.ecsv", format="ascii.ecsv")
    return path, g


def test_score_run_writes_tables_summary_and_report(run_dir):
    """A full scoring writes every table, a JSON summary and a self-contained HTML report;
    bright galaxies are recovered and the isolated fake detection is a noise peak."""
    path, g = run_dir
    out = path / "score_a"
    s = score_run(path, path / "cat.ecsv", BAND, ScoreConfig(mag_min=22, mag_max=32), out)
    for name in ("completeness_mag", "purity_mag", "false_detections", "photometry",
                 "completeness_mag_size", "effective_volume", "summary"):
        assert (out / (name + (".json" if name == "summary" else ".ecsv"))).is_file()
    js = json.loads((out / "summary.json").read_text())
    assert js["n_detections"] == s["n_detections"]
    cm = Table.read(out / "completeness_mag.ecsv")
    bright = (cm["mag_hi"] <= 26) & (cm["n"] > 0)
    # crowded fixture (80 sources in 9 arcsec): allow a few blended losses
    assert np.sum(cm["k"][bright]) >= 0.9 * np.sum(cm["n"][bright])
    # 79 galaxies: the fitted transition is faint, its limit quoted only if the rules allow
    assert s["completeness_fit"]["logistic"]["m_t"] > 26.5
    for key in ("m50", "m90"):
        assert (js[key] is None) == (js[f"{key}_reason"] is not None)
        assert js[key] is None or js[f"{key}_err"] <= metrics.LIMIT_ERR_MAX
    ft = Table.read(out / "false_detections.ecsv")
    x, y = g.sky_to_pixel(ft["ra"], ft["dec"])
    far = np.hypot(x - 5, y - 290) < 1
    assert list(ft["cause"][far]) == ["noise"]
    page = (out / "report.html").read_text()
    assert page.count("data:image/png;base64,") >= 5 and "<img src=\"http" not in page


def test_score_tables_carry_units_descriptions_and_null_volumes(run_dir, tmp_path):
    """Every score table column has a description, magnitudes carry unit mag; V_eff is null
    where a cell holds no source and elsewhere the fraction times the comoving volume of the
    z bin over the mosaic area (astropy.cosmology comoving_volume, Hogg 1999 eq. 29)."""
    path, _ = run_dir
    out = tmp_path / "s"
    score_run(path, path / "cat.ecsv", BAND, ScoreConfig(report=False), out)
    for f in sorted(out.glob("*.ecsv")):
        t = Table.read(f)
        assert t.meta["description"], f.name
        assert [c for c in t.colnames if not t[c].description] == [], f.name
        for c in t.colnames:
            if c == "mag" or c.startswith("mag_"):
                assert t[c].unit == "mag", (f.name, c)
    v = Table.read(out / "effective_volume.ecsv")
    empty = np.asarray(v["n"]) == 0
    assert empty.any() and (~empty).any()
    assert np.all(np.ma.getmaskarray(v["v_eff_mpc3"]) == empty)
    area = (300 * 300 * 0.03**2 * u.arcsec**2).to(u.sr) / (4 * np.pi * u.sr)
    c = default_cosmology()
    vol = (c.comoving_volume(np.asarray(v["z_hi"])) - c.comoving_volume(np.asarray(v["z_lo"])))
    ref = (vol * area).to_value(u.Mpc**3)
    assert_allclose(v["volume_mpc3"], ref, rtol=1e-6)
    assert_allclose(v["v_eff_mpc3"][~empty], (v["fraction"] * ref)[~empty], rtol=1e-6)
    assert v["v_eff_mpc3"].unit == "Mpc3"


def test_spike_angles_are_measured_on_the_psf(run_dir):
    """The synthetic PSF's spikes along the pixel axes are found at 0, 90, 180, 270 deg."""
    path, _ = run_dir
    psf = fits.getdata(path / f"psf_{BAND}.fits", "PSF_WIDE")
    ang = metrics.measure_spike_angles(psf)
    d = np.abs((ang[:, None] - np.array([0, 90, 180, 270])[None, :] + 180) % 360 - 180)
    assert ang.size >= 4 and d.min(axis=1).max() <= 2.0


def test_false_detection_causes_follow_their_rules():
    """Artefact (DQ), spike (along a spike of a bright star), shred (inside the footprint of a
    recovered source), blend (two truth images close), noise (nothing near)."""
    segm = np.zeros((100, 100), int)
    segm[40:60, 40:60] = 2
    dq = np.zeros((100, 100), int)
    dq[5, 5] = 1
    det_x = np.array([5.0, 20.0 + 150, 55.0, 80.0, 95.0, 50.0])
    det_y = np.array([5.0, 10.0, 55.0, 80.0, 95.0, 50.0])
    det_truth = np.array([-1, -1, -1, -1, -1, 1])
    img_x = np.array([10.0 + 150, 50.0, 80.0, 81.0])
    img_y = np.array([10.0, 50.0, 80.5, 79.5])
    cause = metrics.classify_false_detections(
        det_x, det_y, det_truth, img_x, img_y, [1, 2, 3, 4], [17.0, 25.0, 27.0, 27.0],
        [True, False, False, False], {1: True, 2: True, 3: False, 4: False}, 0.03,
        truth_segm=np.pad(segm, ((0, 0), (0, 200))), dq=np.pad(dq, ((0, 0), (0, 200))),
        spike_angles_deg=[0, 90, 180, 270])
    assert list(cause) == ["artefact", "spike", "shred", "blend", "noise", ""]


# ------------------------------------------------------------------------------ bad catalogues
def _write(path, t, name):
    p = path / name
    t.write(p, overwrite=True, format="ascii.csv" if name.endswith(".csv") else None)
    return p


@pytest.mark.parametrize("case, columns, match", [
    ("missing", {"mag": "TOTAL_MAG"}, r"lacks column\(s\) mag='TOTAL_MAG'; available: ra, dec"),
    ("nan", {}, r"1 row\(s\) with NaN/inf values \(mag: 1\)"),
    ("dec_range", {}, r"outside \[-90, 90\]"),
    ("ra_range", {}, r"outside \[0, 360\)"),
    ("flux_as_mag", {}, r"outside the plausible AB range"),
    ("outside", {}, r"1 position\(s\) .* fall outside the mosaic"),
    ("empty", {}, r"is empty"),
    ("flux_unit", {"flux": "mag", "flux_unit": "nJy"}, r"median AB magnitude"),
    ("text", {}, r"is not numeric"),
])
def test_load_catalog_refuses_each_bad_input(tmp_path, case, columns, match):
    """Each kind of bad catalogue is refused with its own message."""
    g = Grid(nx=100, ny=100, scale=0.03, ra0=150.0, dec0=2.0)
    ra, dec = g.pixel_to_sky(np.array([10.0, 50.0, 90.0]), np.array([10.0, 50.0, 90.0]))
    t = Table({"ra": ra, "dec": dec, "mag": [25.0, 26.0, 27.0]})
    if case == "nan":
        t["mag"][1] = np.nan
    elif case == "dec_range":
        t["dec"] = t["dec"] * 100
    elif case == "ra_range":
        t["ra"] = t["ra"] + 360
    elif case == "flux_as_mag":
        t["mag"] = [120.0, 300.0, 80.0]
    elif case == "outside":
        t["ra"][2] += 1.0 / 60
    elif case == "empty":
        t = t[:0]
    elif case == "flux_unit":
        t["mag"] = [1e-30, 2e-30, 3e-30]  # cgs flux densities labelled as nJy
    elif case == "text":
        t["mag"] = ["a", "b", "c"]
    p = _write(tmp_path, t, "c.csv" if case != "empty" else "c.ecsv")
    with pytest.raises(CatalogError, match=match):
        load_catalog(p, columns, zeropoint=ZP, field=(g.wcs, (100, 100)))


def test_load_catalog_skips_invalid_rows_on_request(tmp_path):
    """With skip_invalid, NaN rows and positions off the mosaic are dropped and counted."""
    g = Grid(nx=100, ny=100, scale=0.03, ra0=150.0, dec0=2.0)
    ra, dec = g.pixel_to_sky(np.array([10.0, 50.0, 90.0]), np.array([10.0, 50.0, 90.0]))
    t = Table({"RA": ra, "DEC": dec, "FLUX": [100.0, np.nan, 30.0]})
    t["RA"][2] += 1.0 / 60
    p = _write(tmp_path, t, "c.fits")
    res = load_catalog(p, {"ra": "RA", "dec": "DEC", "flux": "FLUX", "flux_unit": "nJy"},
                       skip_invalid=True, field=(g.wcs, (100, 100)))
    assert len(res) == 1 and res.meta["n_skipped"] == 2
    # AB: m = 31.4 - 2.5 log10(f / nJy) (Oke & Gunn 1983, ApJ 266, 713)
    assert_allclose(res["mag"], 31.4 - 2.5 * np.log10(100.0), rtol=0, atol=1e-9)


def test_cli_error_is_one_line_exit_2_and_writes_nothing(run_dir, tmp_path, capsys):
    """A bad column gives one 'simfield-score: error:' line, status 2, no output directory."""
    path, _ = run_dir
    out = tmp_path / "o"
    rc = score_main_args([str(path), "--catalog", str(path / "cat.ecsv"), "--band", BAND,
                          "--mag-col", "nope", "--out", str(out)])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and err[0].startswith("simfield-score: error: ")
    assert "available: ra, dec, mag" in err[0] and not out.exists()
    rc = score_main_args([str(path), "--bogus"])
    assert rc == 2 and capsys.readouterr().err.startswith("simfield-score: error: ")


@pytest.mark.parametrize("opt,value,want", [
    ("--band", "b99", f"--band: 'b99' is not a band of this run (no mosaic_b99.fits); one of "
                      f"{BAND}"),
    ("--radius", "-1", "--radius: -1 must be in (0, 10] arcsec"),
])
def test_cli_bad_band_or_radius_is_named_as_typed(run_dir, tmp_path, capsys, opt, value, want):
    """A band the run lacks lists the run's bands (its mosaic files, made by the fixture); a
    bad radius names --radius, not the configuration key it sets; one line, exit 2, nothing
    written."""
    path, _ = run_dir
    out = tmp_path / "o"
    args = [path, "--catalog", path / "cat.ecsv", "--band", BAND, "--out", out, opt, value]
    rc, _, err = _cli(args, capsys)
    assert rc == 2 and err == [f"simfield-score: error: {want}"] and not out.exists()


def test_score_run_of_a_missing_band_lists_the_runs_bands(run_dir, tmp_path):
    """From Python too: the bands of the run's mosaic files (the fixture made only one)."""
    path, _ = run_dir
    with pytest.raises(CatalogError, match=f"lacks mosaic_b99.fits .*; its bands: {BAND}$"):
        score_run(path, path / "cat.ecsv", "b99", out_dir=tmp_path / "o")
    assert not (tmp_path / "o").exists()


def test_cli_scores_a_catalogue(run_dir, tmp_path):
    """The command-line scorer runs end to end and writes summary.json."""
    path, _ = run_dir
    out = tmp_path / "o"
    rc = score_main_args([str(path), "--catalog", str(path / "cat.ecsv"), "--band", BAND,
                          "--radius", "0.1", "--out", str(out), "--no-report"])
    assert rc == 0 and json.loads((out / "summary.json").read_text())["match_radius_arcsec"] == 0.1


def test_cli_radius_wins_over_the_runs_radius_in_fwhm(run_dir, tmp_path, monkeypatch):
    """A run scored with its match radius in PSF widths (score.match_radius_fwhm > 0) is
    rescored with the --radius asked for, not silently with the run's FWHM multiple."""
    from types import SimpleNamespace

    from simfield.config import ScoreConfig
    from simfield.score import run as score_module

    path, _ = run_dir
    monkeypatch.setattr(score_module, "run_scenario_of",
                        lambda folder: SimpleNamespace(score=ScoreConfig(match_radius_fwhm=3.0)))
    out = tmp_path / "o"
    rc = score_main_args([str(path), "--catalog", str(path / "cat.ecsv"), "--band", BAND,
                          "--radius", "0.1", "--out", str(out), "--no-report"])
    assert rc == 0 and json.loads((out / "summary.json").read_text())["match_radius_arcsec"] == 0.1


# ------------------------------------------------------------------------------ bounded memory
def test_load_truth_maps_images_and_reads_them_like_astropy(run_dir):
    """load_truth returns memory maps (no float64 / int64 copies) whose values at any pixel
    equal astropy.io.fits' reading of the files."""
    from simfield.score.run import load_truth, pixel_values

    path, _ = run_dir
    t = load_truth(path, BAND)
    for key, fname, ext in (("sci", "mosaic", "IMAGE"), ("dq", "mosaic", "FLAGS"),
                            ("segm", "truth_image", "SEGMAP")):
        assert isinstance(t[key], np.memmap), key
        assert t[key].dtype.itemsize == 4, key
        ref = fits.getdata(path / f"{fname}_{BAND}.fits", ext)
        assert_array_equal(np.asarray(t[key]), ref)
    assert t["shape"] == (300, 300)
    rng = np.random.default_rng(2)
    x, y = rng.uniform(-3, 303, 50), rng.uniform(-3, 303, 50)
    ref = fits.getdata(path / f"truth_image_{BAND}.fits", "SEGMAP")
    ix, iy = np.clip(np.round(x).astype(int), 0, 299), np.clip(np.round(y).astype(int), 0, 299)
    assert_array_equal(pixel_values(t["segm"], x, y), ref[iy, ix])


def test_flagged_pixel_makes_an_unmatched_detection_an_artefact(tmp_path):
    """A detection on a pixel the truth's artefact map marks is an artefact (rule 1 wins over
    the others), read from that map at that pixel alone; a mosaic flag that only says how a
    value was measured (a repaired cosmic ray) does not make one."""
    g, *_ = _make_run(tmp_path)
    with fits.open(tmp_path / f"mosaic_{BAND}.fits", mode="update") as hl:
        hl["FLAGS"].data[100, 260] = 8  # only cosmic-ray-repaired pixels contributed
    with fits.open(tmp_path / f"truth_image_{BAND}.fits", mode="update") as hl:
        art = np.zeros(hl["IMAGE"].data.shape, np.int16)
        art[100, 40] = 2  # saturated in an exposure
        hl.append(fits.ImageHDU(art, name="ARTEFACT"))
    ra, dec = g.pixel_to_sky(np.array([40.0, 260.0]), np.array([100.0, 100.0]))
    cat = Table({"ra": ra, "dec": dec, "mag": [27.0, 27.0]})
    score_run(tmp_path, cat, BAND, ScoreConfig(report=False), tmp_path / "s")
    ft = Table.read(tmp_path / "s" / "false_detections.ecsv")
    x, y = g.sky_to_pixel(ft["ra"], ft["dec"])
    assert ft["cause"][np.argmin(np.hypot(x - 40, y - 100))] == "artefact"
    assert ft["cause"][np.argmin(np.hypot(x - 260, y - 100))] != "artefact"


def test_colour_preview_is_the_strided_whole_image_preview(run_dir):
    """The preview read by strided rows of the memory map equals the one computed from the
    whole image read by astropy and subsampled (every step-th pixel)."""
    from simfield.score.report import _colour_preview, _stretch

    path, _ = run_dir
    rgb, used = _colour_preview(path, max_side=70)
    full = np.nan_to_num(fits.getdata(path / f"mosaic_{BAND}.fits", "IMAGE").astype(float))
    c = full[::5, ::5]  # ceil(300 / 70) = 5
    med = np.median(c)
    mad = 1.4826 * np.median(np.abs(c - med))
    assert used == [BAND] * 3 and rgb.shape == (60, 60, 3)
    assert_allclose(rgb[..., 0], _stretch(c, med - mad, med + 200 * mad), rtol=0, atol=1e-12)


# ------------------------------------------------------------------------------ catalogue checks
def _cli(args, capsys):
    rc = score_main_args([str(a) for a in args])
    cap = capsys.readouterr()
    return rc, cap.out.strip().splitlines(), cap.err.strip().splitlines()


def test_vector_column_is_chosen_by_0_based_index_or_refused(run_dir, tmp_path, capsys):
    """MAG_APER[1] scores element 1 (0-based) of a 3-aperture column; MAG_APER alone and
    MAG_APER[3] are refused with one line, exit 2, nothing written."""
    path, _ = run_dir
    cat = Table.read(path / "cat.ecsv")
    t = Table({"ra": cat["ra"], "dec": cat["dec"],
               "MAG_APER": np.column_stack([cat["mag"] + 0.5, cat["mag"], cat["mag"] - 0.5])})
    t.write(tmp_path / "vec.fits")
    res = load_catalog(tmp_path / "vec.fits", {"mag": "MAG_APER[1]"})
    assert_allclose(res["mag"], cat["mag"], rtol=0, atol=1e-12)
    assert res.meta["columns"]["mag"] == "MAG_APER[1]"
    for spec, msg in (("MAG_APER", "MAG_APER: 3 values per row (mag); pick one as MAG_APER[i] "
                                   "with i = 0..2 (0-based)"),
                      ("MAG_APER[3]", "MAG_APER[3]: index out of range; i = 0..2 (0-based)")):
        out = tmp_path / spec.replace("[", "_").replace("]", "")
        rc, _, err = _cli([path, "--catalog", tmp_path / "vec.fits", "--band", BAND,
                           "--mag-col", spec, "--out", out], capsys)
        assert rc == 2 and err == [f"simfield-score: error: {msg}"] and not out.exists()
    rc, _, err = _cli([path, "--catalog", tmp_path / "vec.fits", "--band", BAND, "--mag-col",
                       "MAG_APER[1]", "--no-report", "--out", tmp_path / "ok"], capsys)
    assert rc == 0 and (tmp_path / "ok" / "summary.json").is_file()


def test_duplicate_rows_are_refused_with_their_count_or_dropped(run_dir, tmp_path, capsys):
    """Rows within 1 milliarcsec of an earlier row (counted against astropy
    search_around_sky) are refused with their count, or dropped with --drop-duplicates."""
    path, _ = run_dir
    cat = Table.read(path / "cat.ecsv")
    extra = cat[:3].copy()
    extra["dec"][1] += 0.5e-3 / 3600  # 0.5 mas away: a duplicate
    extra["dec"][2] += 5e-3 / 3600  # 5 mas away: not one
    t = Table(np.concatenate([cat.as_array(), extra.as_array()]))
    t.write(tmp_path / "dup.ecsv")
    sc = SkyCoord(t["ra"] * u.deg, t["dec"] * u.deg)
    i, j, _, _ = search_around_sky(sc, sc, 1e-3 * u.arcsec)
    n_ref = len({max(a, b) for a, b in zip(i, j) if a != b})
    assert n_ref == 2
    out = tmp_path / "o"
    rc, _, err = _cli([path, "--catalog", tmp_path / "dup.ecsv", "--band", BAND, "--out", out],
                      capsys)
    assert rc == 2 and len(err) == 1 and not out.exists()
    assert "ra/dec: 2 row(s) within 1 milliarcsec" in err[0] and "--drop-duplicates" in err[0]
    rc, _, _ = _cli([path, "--catalog", tmp_path / "dup.ecsv", "--band", BAND, "--out", out,
                     "--no-report", "--drop-duplicates"], capsys)
    js = json.loads((out / "summary.json").read_text())
    assert rc == 0 and js["catalog_duplicates_dropped"] == 2
    assert js["n_detections"] == len(cat) + 1


def test_catalogue_on_another_flux_scale_is_refused(run_dir, tmp_path, capsys):
    """uJy declared as nJy, magnitudes + 10 and e-/s declared as nJy are refused with the
    column, the offset and the option; the uJy offset exceeds the right one by 7.5 mag
    (AB: 1 uJy = 23.9, 1 nJy = 31.4; Oke & Gunn 1983, ApJ 266, 713); --allow-flux-offset
    scores it and records the offset."""
    path, _ = run_dir
    cat = Table.read(path / "cat.ecsv")
    njy = 10 ** (-0.4 * (np.asarray(cat["mag"]) - 31.4))
    cases = {"ujy": ("flux", njy / 1e3), "plus10": ("mag", cat["mag"] + 10),
             "eps": ("flux", 10 ** (-0.4 * (np.asarray(cat["mag"]) - ZP)))}
    good = score_run(path, path / "cat.ecsv", BAND, ScoreConfig(report=False), tmp_path / "g")
    off0 = good["magnitude_check"]["median_offset"]
    assert abs(off0) < 0.5 and good["magnitude_check"]["n_pairs"] >= 10
    for name, (col, v) in cases.items():
        Table({"ra": cat["ra"], "dec": cat["dec"], col: v}).write(tmp_path / f"{name}.ecsv")
        opt = ["--flux-col", "flux"] if col == "flux" else []
        out = tmp_path / name
        rc, _, err = _cli([path, "--catalog", tmp_path / f"{name}.ecsv", "--band", BAND,
                           "--out", out, *opt], capsys)
        assert rc == 2 and len(err) == 1 and not out.exists(), name
        assert err[0].startswith(f"simfield-score: error: {col}: median offset +")
        assert "at most 1 mag allowed" in err[0] and "--allow-flux-offset" in err[0]
    s = score_run(path, tmp_path / "ujy.ecsv", BAND, ScoreConfig(report=False), tmp_path / "u",
                  {"flux": "flux"}, allow_flux_offset=True)
    assert_allclose(s["magnitude_check"]["median_offset"] - off0, 7.5, rtol=0, atol=1e-9)


def test_magnitude_check_needs_ten_pairs(run_dir, tmp_path):
    """A catalogue with fewer than 10 bright isolated matches cannot pass the magnitude check
    by chance: refused unless allowed."""
    path, _ = run_dir
    cat = Table.read(path / "cat.ecsv")
    cat[np.argsort(cat["mag"])[:5]].write(tmp_path / "five.ecsv")
    with pytest.raises(CatalogError, match=r"only [0-5] bright isolated matches .* at least 10"):
        score_run(path, tmp_path / "five.ecsv", BAND, ScoreConfig(report=False), tmp_path / "o")
    assert not (tmp_path / "o").exists()
    s = score_run(path, tmp_path / "five.ecsv", BAND, ScoreConfig(report=False), tmp_path / "o",
                  allow_flux_offset=True)
    assert s["magnitude_check"]["median_offset"] is None


def test_default_band_is_the_runs_detection_band(tmp_path):
    """Without --band: summary.json's detection band, else the scenario's detection band
    (scenario.yaml), else the only mosaic; otherwise one line listing the bands."""
    from simfield.config import to_yaml
    from simfield.score.run import run_detection_band
    from tests.conftest import make_scenario

    for b in ("b10", "b36"):
        (tmp_path / f"mosaic_{b}.fits").write_bytes(b"")
    with pytest.raises(CatalogError, match=r"--band: not given .* one of b10, b36"):
        run_detection_band(tmp_path)
    sc = make_scenario("detection.bands=[b13]")
    (tmp_path / "scenario.yaml").write_text(to_yaml(sc))
    assert run_detection_band(tmp_path) == ("b13", "the scenario's detection band")
    (tmp_path / "summary.json").write_text(json.dumps({"detections": {"b36": 4}}))
    assert run_detection_band(tmp_path)[0] == "b36"


def test_each_catalogue_gets_its_own_default_folder(run_dir, capsys):
    """Two catalogues scored without --out land in score_<stem>/<band>, apart from each other
    and from the run's own score/; the band and the folder are printed. A catalogue of the
    same stem scored again replaces the earlier results."""
    path, _ = run_dir
    Table.read(path / "cat.ecsv").write(path / "other.ecsv", overwrite=True)
    for stem in ("cat", "other"):
        rc, out, _ = _cli([path, "--catalog", path / f"{stem}.ecsv", "--no-report"], capsys)
        assert rc == 0
        assert out[-1].startswith(f"simfield-score: band {BAND} (the run's only mosaic);")
        assert out[-1].endswith(f"results in {path / f'score_{stem}' / BAND}")
        js = json.loads((path / f"score_{stem}" / BAND / "summary.json").read_text())
        assert js["catalog"].endswith(f"{stem}.ecsv")
    assert not (path / "score").exists()
    # the same stem again (README: cat.csv after cat.ecsv writes over cat.ecsv's results)
    t = Table.read(path / "cat.ecsv")
    t[:-1].write(path / "cat.csv", format="ascii.csv", overwrite=True)
    rc, _, _ = _cli([path, "--catalog", path / "cat.csv", "--no-report"], capsys)
    js = json.loads((path / "score_cat" / BAND / "summary.json").read_text())
    assert rc == 0 and js["catalog"].endswith("cat.csv") and js["n_detections"] == len(t) - 1
