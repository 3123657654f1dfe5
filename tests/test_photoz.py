"""Photometric redshifts: templates, the chi2 fit, P(z), the run entry point, refusals.

Comparison to other sources: Oke & Gunn 1983 (AB colours of a flat f_nu source), Madau 1995
(IGM transmission, typed here from the paper), Calzetti et al. 2000 eq. 4 (typed here),
scipy.optimize.nnls (non-negative amplitudes), scipy.integrate (band averages, P(z) norm),
Brammer et al. 2008 (sigma_NMAD). Internal regressions are marked as such.
"""

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from numpy.testing import assert_allclose
from scipy import integrate, optimize

from simfield.bands import ab_to_njy, make_band
from simfield.errors import CatalogError, ConfigError
from simfield.io import Provenance
from simfield.photoz import (build_templates, default_families, fit_photoz, fit_run,
                             redshift_grid)
from simfield.photoz.dust import calzetti_k
from simfield.photoz.templates import dusty_family, starforming_family
from simfield.population.luminosity import uv_lf_parameters
from simfield.population.seds import SEDParameters, band_weight_matrix, draw_sed_parameters, \
    galaxy_fnu, wave_grid
from tests.conftest import make_scenario

BANDS = [make_band(n, c, w, t) for n, c, w, t in [
    ("b10", 1000, 220, .30), ("b13", 1300, 290, .35), ("b17", 1700, 380, .40),
    ("b23", 2300, 520, .42), ("b36", 3600, 800, .45)]]
BETAS = [-2.8, -2.4, -2.0, -1.6, -1.2, -0.8, -0.4]
A_V = [0.5, 1.0, 2.0, 3.0, 4.0]
DZ = 0.01
Z = redshift_grid(0.0, 20.0, DZ)
CUTS = [5.5, 6.5, 7.5, 9.5, 12.5]


@pytest.fixture(scope="module")
def tset():
    return build_templates(BANDS, Z, default_families(BETAS, A_V))


def _flat(wave_rest_nm):
    return ["flat"], np.ones((1,) + np.shape(wave_rest_nm))


def _population_fluxes(z, m_uv, sed, bands=BANDS):
    """Band fluxes (nJy) through the population's own path: galaxy_fnu + band weights."""
    wave = wave_grid(bands)
    f = galaxy_fnu(wave, z, m_uv, sed.beta, sed.break_strength, sed.beta_opt)
    return f @ band_weight_matrix(wave, bands)


# ------------------------------------------------------------------------------- templates
def test_flat_fnu_has_zero_colours():
    """A flat f_nu source has band flux = f_nu in every band, i.e. zero AB colours
    (Oke & Gunn 1983, ApJ 266, 713); z <= 5 keeps Lyman alpha blueward of every band."""
    t = build_templates(BANDS, np.array([0.0, 1.0, 3.0, 5.0]), [_flat])
    assert_allclose(t.flux, 1.0, rtol=1e-12)


def test_igm_suppression_is_madau1995():
    """Blueward of Lyman alpha the template flux is the band average of exp(-tau) with the
    Madau 1995 (ApJ 441, 18) eq. 15 Lyman-alpha term tau = 3.6e-3 (lambda / 121.567 nm)^3.46,
    typed here, integrated with scipy.integrate.quad over the band (z = 8: the band lies
    between Lyman beta (923 nm) and Lyman alpha (1094 nm), so only that term acts).
    Tolerance 2e-3: trapezoid rule on the 1/200 ln-lambda grid against adaptive quadrature."""
    band = make_band("narrow", 1010, 80, 0.5)
    z = 8.0
    t = build_templates([band], np.array([z]), [_flat]).flux[0, 0, 0]

    def thr(lam):
        return np.interp(lam, band.wave, band.throughput)

    def trans(lam):
        return np.exp(-3.6e-3 * (lam / 121.567) ** 3.46)

    lo, hi = band.wave[0], band.wave[-1]
    num = integrate.quad(lambda l: thr(l) * trans(l) / l, lo, hi, limit=200)[0]
    den = integrate.quad(lambda l: thr(l) / l, lo, hi, limit=200)[0]
    assert t < 0.9  # suppressed at all
    assert_allclose(t, num / den, rtol=2e-3)
    # below the Lyman limit (91.2 (1 + z) nm = 1368 nm at z = 14) the b10 flux is ~0
    # (Madau 1995 dropout rule; the templates keep no Lyman continuum)
    assert build_templates(BANDS, np.array([14.0]), [_flat]).flux[0, 0, 0] < 1e-6


@pytest.mark.parametrize("lam_um", [0.13, 0.15, 0.30, 0.50, 0.70, 1.20, 2.00])
def test_calzetti_k_published_formula(lam_um):
    """k(lambda) of Calzetti et al. 2000 (ApJ 533, 682) eq. 4 with R_V = 4.05, typed here."""
    li = 1.0 / lam_um
    if lam_um < 0.63:
        k = 2.659 * (-2.156 + 1.509 * li - 0.198 * li**2 + 0.011 * li**3) + 4.05
    else:
        k = 2.659 * (-1.857 + 1.040 * li) + 4.05
    assert_allclose(calzetti_k(1000.0 * lam_um), k, rtol=1e-12)


def test_calzetti_k_v_is_rv_and_dusty_template_colours():
    """k(V = 0.55 um) = R_V = 4.05 (A_V = k(V) E(B-V); Calzetti et al. 2000 eq. 5, to 0.01),
    and a dusty template is the dust-free one times 10^(-0.4 A_V (k - k(150 nm)) / R_V)."""
    assert_allclose(calzetti_k(550.0), 4.05, atol=0.01)
    w = np.array([150.0, 300.0, 600.0, 1500.0])
    dusty = dusty_family([2.0], beta=-2.2)(w)[1][0]
    base = starforming_family([-2.2])(w)[1][0]
    li = 1.0 / (w / 1000.0)
    k = np.where(w < 630, 2.659 * (-2.156 + 1.509 * li - 0.198 * li**2 + 0.011 * li**3),
                 2.659 * (-1.857 + 1.040 * li)) + 4.05
    assert_allclose(dusty / base, 10 ** (-0.4 * 2.0 * (k - k[0]) / 4.05), rtol=1e-10)


def test_line_templates_follow_equivalent_width():
    """Lines of rest equivalent width W on a flat f_nu continuum raise the photon-weighted
    band mean by sum_j W_obs,j T(lambda_j) / lambda_j / int T dlambda / lambda (definition of
    the equivalent width, common practice; denominator by scipy.integrate.simpson): z = 6 puts
    [OIII] 495.9/500.7 and H beta on the flat top of a 3200-3800 nm band, H alpha and [OII]
    outside it. Tolerance 1e-3: the lines are Gaussians sampled on the 1/200 ln-lambda grid."""
    from simfield.photoz.lines import add_lines

    band = make_band("wide", 3500, 600, 0.5)
    z, ew = 6.0, 60.0

    def fam(w):
        return ["flat+lines"], add_lines(w[None], np.ones((1,) + w.shape), ew)

    got = build_templates([band], np.array([z]), [fam]).flux[0, 0, 0]
    lam = np.linspace(band.wave[0], band.wave[-1], 200001)
    den = integrate.simpson(np.interp(lam, band.wave, band.throughput) / lam, x=lam)
    # shares of the [OIII] + H beta complex: 0.6, 0.2, 0.2 (simfield.photoz.lines docstring)
    num = sum(s * ew * (1 + z) * 0.5 / (lam * (1 + z))
              for s, lam in ((0.6, 500.7), (0.2, 495.9), (0.2, 486.1)))
    assert_allclose(got, 1.0 + num / den, rtol=1e-3)


# ------------------------------------------------------------------------------- the fit
def test_amplitudes_and_chi2_match_scipy_nnls(tset):
    """The analytic clipped amplitude equals scipy.optimize.nnls for one template and z, so
    chi2_best is the smallest NNLS residual^2 over the grid (to 1e-8 relative)."""
    rng = np.random.default_rng(3)
    flux = rng.normal(5.0, 10.0, (4, 5))
    err = rng.uniform(2.0, 6.0, (4, 5))
    res = fit_photoz(flux, err, tset)
    for i in range(4):
        a = tset.flux.reshape(-1, 5) / err[i]
        chi2 = [optimize.nnls(row[:, None], flux[i] / err[i])[1] ** 2 for row in a]
        assert_allclose(res.chi2_best[i], min(chi2), rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("z_true", [0.5, 2.0, 4.0, 7.0, 10.0, 14.0])
@pytest.mark.parametrize("kind", ["starforming", "evolved"])
def test_noiseless_redshift_recovered(tset, z_true, kind):
    """Noiseless fluxes of a population spectrum (galaxy_fnu, off the grid) give z_best within
    one grid step of the truth (|d ln(1+z)| <= dz_over_1pz) and a 68 % interval holding it.
    Errors are 1 % of the brightest band (common practice: a fit of exact data with small
    errors must return the input)."""
    # mean star-forming (beta -2, beta_opt -1.2, break 1.25) and evolved parameters
    params = {"starforming": (-2.0, -1.2, 1.25), "evolved": (1.0, -0.7, 1.9)}[kind]
    sed = SEDParameters(np.array([kind]), *(np.array([v]) for v in params))
    f = _population_fluxes(np.array([z_true]), np.array([-21.0]), sed)
    err = np.full_like(f, 0.01 * f.max())
    r = fit_photoz(f, err, tset, CUTS)
    assert abs(np.log1p(r.z_best[0]) - np.log1p(z_true)) <= DZ * 1.0001
    assert r.z_lo[0] <= z_true <= r.z_hi[0]


def test_noisy_population_outliers_and_nmad(tset):
    """Few hundred galaxies with the population's own SED distribution (draw_sed_parameters,
    seeded), S/N = 10 in the reddest band, Gaussian errors: report the catastrophic-outlier
    fraction |dz|/(1+z) > 0.15 (common practice) and sigma_NMAD = 1.48 median(|dz - median
    dz| / (1+z)) (Brammer et al. 2008, ApJ 686, 1503); assert only a loose sanity bound."""
    rng = np.random.default_rng(20261202)
    n = 400
    z = rng.uniform(0.3, 15.0, n)
    m_uv = rng.uniform(-22.5, -18.0, n)
    sed = draw_sed_parameters(z, m_uv, uv_lf_parameters(z).m_star, rng)
    f = _population_fluxes(z, m_uv, sed)
    err = np.repeat(f[:, -1:] / 10.0, 5, axis=1)  # equal depth in every band
    r = fit_photoz(f + err * rng.standard_normal(f.shape), err, tset, CUTS)
    dz = (r.z_best - z) / (1 + z)
    outliers = np.mean(np.abs(dz) > 0.15)
    nmad = 1.48 * np.median(np.abs(dz - np.median(dz)))
    hi = z > 7.0  # the Lyman break inside the bands
    out_hi = np.mean(np.abs(dz[hi]) > 0.15)
    print(f"\nphotoz S/N 10, n={n}: outlier fraction {outliers:.3f}, sigma_NMAD {nmad:.4f}; "
          f"z > 7 ({hi.sum()}): outlier fraction {out_hi:.3f}")
    # loose: five near-infrared bands leave z ~ 2-6 poorly constrained at S/N 10
    assert outliers < 0.5 and nmad < 0.15 and out_hi < 0.2


def test_pz_integrates_to_one_and_missing_bands_are_skipped(tset):
    """Every P(z) integrates to 1 (scipy.integrate.trapezoid), also with missing bands (NaN
    or zero errors) and with no band at all (flat P(z)); a band marked missing gives the
    fit without that band (internal regression)."""
    rng = np.random.default_rng(5)
    flux = rng.normal(10.0, 5.0, (30, 5))
    err = rng.uniform(1.0, 3.0, (30, 5))
    err[3, 1], err[4, 2], err[5, :] = np.nan, 0.0, np.nan
    r = fit_photoz(flux, err, tset, CUTS)
    assert_allclose(integrate.trapezoid(r.pz, Z, axis=1), 1.0, rtol=1e-5)
    assert r.n_bands[3] == 4 and r.n_bands[5] == 0
    assert_allclose(r.pz[5], 1.0 / Z[-1], rtol=1e-5)
    keep = [0, 2, 3, 4]
    sub = type(tset)(tset.names, tset.z, [tset.bands[k] for k in keep], tset.flux[:, :, keep])
    r2 = fit_photoz(flux[3:4, keep], err[3:4, keep], sub)
    assert_allclose(r.pz[3], r2.pz[0], rtol=1e-5)
    for c in CUTS:  # P(z > c) from the CDF, against scipy's cumulative trapezoid
        cdf = integrate.cumulative_trapezoid(r.pz[0].astype(float), Z, initial=0.0)
        assert_allclose(r.p_gt[c][0], 1 - np.interp(c, Z, cdf), atol=1e-5)


def test_bad_flux_shape_refused(tset):
    """Fluxes with the wrong number of bands are refused in one line naming the bands."""
    with pytest.raises(CatalogError, match=r"flux has shape \(3, 4\).*b10, b13"):
        fit_photoz(np.ones((3, 4)), np.ones((3, 4)), tset)


# ------------------------------------------------------------------------------- config, run
@pytest.mark.parametrize("override, key", [
    ("photoz.z_max=12", r"photoz\.z_cuts\.4=12\.5 must be a redshift inside the grid"),
    ("photoz.z_min=6", r"photoz\.z_cuts\.0=5\.5"),
    ("photoz.dz_over_1pz=0", r"photoz\.dz_over_1pz=0"),
    ("photoz.dz_over_1pz=1e-5", r"photoz\.dz_over_1pz=1e-05 gives"),
    ("photoz.prior=flat", r"photoz\.prior='flat' must be one of: none, luminosity"),
    ("photoz.a_v=[-1]", r"photoz\.a_v\.0=-1"),
])
def test_bad_grid_refused(override, key):
    """A grid that does not cover the cuts (or is empty or too fine) is refused in one line."""
    with pytest.raises(ConfigError, match=key):
        make_scenario(override)


def _write_photometry(path, flux, err, bands):
    t = Table({"id": np.arange(1, len(flux) + 1), "ra": np.zeros(len(flux)),
               "dec": np.zeros(len(flux)), "x": np.zeros(len(flux)), "y": np.zeros(len(flux))})
    for k, b in enumerate(bands):
        t[f"flux_{b}"], t[f"flux_err_{b}"] = flux[:, k], err[:, k]
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU(t, name="PHOTOMETRY")]).writeto(path)


@pytest.mark.parametrize("prior", ["none", "luminosity"])
def test_fit_run_writes_photoz_fits(tmp_path, prior):
    """fit_run reads PHOTOMETRY and writes PHOTOZ (units and descriptions on every column),
    PZ (n_rows x n_z float32) and ZGRID, with provenance; a high-z source gets P(z > 6.5) high."""
    sc = make_scenario(f"photoz.prior={prior}")
    sed = draw_sed_parameters([1.5, 8.0], [-21, -21], [-21, -21], np.random.default_rng(1),
                              evolved=[False, False])
    f = _population_fluxes(np.array([1.5, 8.0]), np.array([-21.0, -21.0]), sed)
    err = np.repeat(f[:, -1:] / 20.0, 5, axis=1)
    _write_photometry(tmp_path / "photometry.fits", f, err, sc.band_names)
    prov = Provenance(sc.seed, "abc123", "seed: 1\n")
    summary = fit_run(tmp_path, sc, prov)
    assert summary["n_objects"] == 2 and summary["n_z"] == Z.size
    with fits.open(tmp_path / "photoz.fits") as hl:
        assert hl["PHOTOZ"].header["SIMFHASH"] == "abc123"
        assert hl["PZ"].data.shape == (2, Z.size) and hl["PZ"].data.dtype.itemsize == 4
        assert_allclose(hl["ZGRID"].data["z"], Z)
    t = Table.read(tmp_path / "photoz.fits", hdu="PHOTOZ")
    assert {"id", "z_best", "z_lo", "z_hi", "chi2_best", "p_gt_5p5", "p_gt_6p5",
            "p_gt_12p5"} <= set(t.colnames)
    assert all(t[c].description for c in t.colnames)
    assert t["p_gt_6p5"][0] < 0.1
    if prior == "none":  # a flat prior lets the Lyman break decide
        assert t["p_gt_6p5"][1] > 0.9


def test_luminosity_prior_weights():
    """The luminosity prior is phi(M_UV, z) dV/dz with the Schechter form (Schechter 1976,
    ApJ 203, 297, typed here, with the population's parameters uv_lf_parameters) and dV/dz of
    astropy's FlatLambdaCDM(H0=70, Om0=0.3) (the project's default cosmology), per arcsec^2;
    M_UV = 31.4 - 2.5 log10(a) - DM + 2.5 log10(1 + z) (Oke & Gunn 1983; Hogg 1999 eq. 25)."""
    from astropy.cosmology import FlatLambdaCDM

    from simfield.photoz.prior import luminosity_prior

    z = np.array([1.0, 3.0, 8.0])
    amp = np.full((1, 1, 3), 50.0)
    got = luminosity_prior(z, abs_mag_faint=-13.0)(amp, z)[0, 0]
    cosmo = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725)
    m_uv = 31.4 - 2.5 * np.log10(50.0) - cosmo.distmod(z).value + 2.5 * np.log10(1 + z)
    p = uv_lf_parameters(z)
    x = 10 ** (-0.4 * (m_uv - p.m_star))
    phi = 0.4 * np.log(10) * p.phi_star * x ** (p.alpha + 1) * np.exp(-x)
    dvdz = cosmo.differential_comoving_volume(z).value / (180 / np.pi * 3600) ** 2
    assert_allclose(got, phi * dvdz, rtol=1e-6)


def test_fit_run_without_photometry_refused(tmp_path):
    """No photometry.fits: one clear error naming the file, before any work."""
    sc = make_scenario()
    with pytest.raises(CatalogError, match="photometry.fits not found"):
        fit_run(tmp_path, sc, Provenance(1, "x", ""))


def test_abs_flux_scale_irrelevant(tset):
    """Scaling every flux and error by one factor leaves P(z) unchanged (the amplitude is
    free; internal regression)."""
    f = ab_to_njy(np.array([[29.0, 28.5, 28.2, 28.0, 28.1]]))
    e = np.full_like(f, 3.0)
    assert_allclose(fit_photoz(f, e, tset).pz, fit_photoz(7 * f, 7 * e, tset).pz, rtol=1e-4)


def test_dwarf_star_fit_finds_the_type_and_matches_nnls():
    """Noiseless photometry of a cool dwarf of the population's own model is fitted by its own
    spectral type with chi2 ~ 0, and a galaxy's chi2 against the dwarf templates equals the
    non-negative least squares of scipy.optimize.nnls for each template."""
    from scipy.optimize import nnls

    from simfield.bands import make_band
    from simfield.photoz.stars import DWARF_TYPES, dwarf_templates, fit_stars

    bands = [make_band(n, c, w, 0.4, 0.2) for n, c, w in
             (("b10", 1000, 220), ("b13", 1300, 290), ("b17", 1700, 380), ("b23", 2300, 520),
              ("b36", 3600, 800))]
    t = dwarf_templates(bands)
    truth = [3, 10, 18]  # M, L and T types
    flux = 50.0 * t[truth]
    err = np.full(flux.shape, 0.5)
    chi2, best = fit_stars(flux, err, t)
    assert_allclose(best, DWARF_TYPES[truth])
    assert np.all(chi2 < 1e-6)
    rng = np.random.default_rng(4)
    f = rng.normal(20.0, 5.0, (1, len(bands)))
    e = np.full(f.shape, 2.0)
    chi2, _ = fit_stars(f, e, t)
    ref = min(nnls((t[k] / e[0])[:, None], f[0] / e[0])[1] ** 2 for k in range(len(t)))
    assert_allclose(chi2[0], ref, rtol=1e-8)
