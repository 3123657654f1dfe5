"""Contaminant families: cool dwarfs, dusty and quiescent galaxies, nebular emission lines.

Comparison to other sources (each check names its own):
- Calzetti et al. 2000, ApJ 533, 682, eq. 4 (typed in here) and the k values at 150 nm,
  Hbeta and Halpha that are quoted widely (k = 10.33, 4.60, 3.33) [mem];
- near-infrared colours of M/L/T dwarfs (Vega, MKO): ranges read off Dupuy & Liu 2012, ApJS
  201, 19 (figs. of J-H, H-K against spectral type) and Patten et al. 2006, ApJ 651, 502
  (K-[3.6]) [mem]; Vega-to-AB offsets of Hewett et al. 2006, MNRAS 367, 454 [mem];
- a line of known equivalent width: synthetic photometry of a spectrum with a narrow Gaussian
  line, integrated here with numpy on a fine grid (the definition of <f_nu>, not the code's
  analytic formula); case-B Halpha/Hbeta = 2.86 (Osterbrock & Ferland 2006, table 4.2);
- counts: Poisson statistics (scipy.stats) of the configured densities.
"""

from __future__ import annotations

import dataclasses
import json

import galsim
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from simfield.bands import AB_NJY_ZERO, make_band
from simfield.config import PopulationConfig
from simfield.errors import ConfigError
from simfield.population import _photometry, dust, dwarfs, lines, make_population, make_profile
from simfield.population.lightcone import line_parameters
from simfield.population.seds import galaxy_fnu
from simfield.random import stream
from tests.conftest import make_scenario

BANDS = [make_band("b10", 1000, 220, 0.30), make_band("b13", 1300, 290, 0.35),
         make_band("b17", 1700, 380, 0.40), make_band("b23", 2300, 520, 0.42),
         make_band("b36", 3600, 800, 0.45)]
# Vega-to-AB offsets (Hewett et al. 2006, table 7 [mem]): J 0.938, H 1.379, K 1.900
J_AB, H_AB, K_AB, I1_AB = 0.938, 1.379, 1.900, 2.779


def _pop(**kw) -> PopulationConfig:
    return dataclasses.replace(PopulationConfig(), **kw)


# ------------------------------------------------------------------------------------------
# Calzetti et al. 2000, ApJ 533, 682
# ------------------------------------------------------------------------------------------
def _calzetti_eq4(l_um):
    """Eq. 4 of Calzetti et al. 2000 with R_V = 4.05 (eq. 5), l in micron."""
    l_um = np.asarray(l_um, float)
    uv = 2.659 * (-2.156 + 1.509 / l_um - 0.198 / l_um**2 + 0.011 / l_um**3) + 4.05
    opt = 2.659 * (-1.857 + 1.040 / l_um) + 4.05
    return np.where(l_um < 0.63, uv, opt)


def test_calzetti_k_matches_eq4():
    """k(lambda) at 0.12-2.2 micron equals eq. 4 of Calzetti et al. 2000 (R_V = 4.05)."""
    l_um = np.array([0.125, 0.15, 0.2, 0.3, 0.44, 0.55, 0.62, 0.65, 0.8, 1.0, 1.6, 2.2])
    assert_allclose(dust.calzetti_k(l_um * 1000.0), _calzetti_eq4(l_um), rtol=1e-12)


def test_calzetti_k_quoted_values():
    """k(150 nm) = 10.33, k(Hbeta) = 4.60, k(Halpha) = 3.33 (values quoted from Calzetti et
    al. 2000 throughout the literature [mem]; 0.01 is their rounding); k(V) ~ R_V = 4.05."""
    assert_allclose(dust.calzetti_k([150.0, 486.1, 656.3]), [10.33, 4.60, 3.33], atol=0.01)
    assert_allclose(dust.calzetti_k(550.0), 4.05, atol=0.01)


def test_calzetti_continuation_is_positive_and_falling():
    """Beyond 2.2 micron the curve keeps falling and stays positive (eq. 4 itself would turn
    negative beyond 1.040 / (1.857 - 4.05/2.659) = 3.11 micron)."""
    assert _calzetti_eq4(3.2) < 0
    k = dust.calzetti_k([2200.0, 3000.0, 5000.0])
    assert np.all(k > 0) and np.all(np.diff(k) < 0)


def test_dust_dims_a_narrow_band_by_a_v_k_over_r_v():
    """A galaxy's magnitude in a narrow band grows by A_V k(lambda_rest) / R_V, with k from
    eq. 4 of Calzetti et al. 2000 at the band's rest wavelength (the continuum is smooth)."""
    narrow = [make_band("n20", 2000, 10, 0.5)]
    phot = _photometry.Photometry(narrow, 0, _photometry.Distances(0.5, 4.0, None))
    z = np.array([1.0, 2.0, 3.0])
    ones = np.ones(3)
    args = (z, -21.0 * ones, -2.0 * ones, 1.3 * ones, -1.2 * ones)
    m0 = phot.mags(*args)[:, 0]
    m1 = phot.mags(*args, av=1.5 * ones)[:, 0]
    expect = 1.5 * _calzetti_eq4(2.0 / (1.0 + z)) / 4.05
    assert_allclose(m1 - m0, expect, atol=2e-3)  # 2e-3: k varies across the 0.5% wide band


# ------------------------------------------------------------------------------------------
# emission lines
# ------------------------------------------------------------------------------------------
def _synthetic_fnu(band, wave, fnu):
    """<f_nu> = int f_nu T dlambda/lambda / int T dlambda/lambda (photon-weighted mean, the AB
    synthetic magnitude's definition, Oke & Gunn 1983) by numpy trapezoids."""
    t = np.interp(wave, band.wave, band.throughput, left=0.0, right=0.0)
    return np.trapezoid(fnu * t / wave, wave) / np.trapezoid(t / wave, wave)


def test_line_of_known_ew_raises_band_flux_by_the_analytic_amount():
    """Halpha (EW 400 A rest) and Hbeta (case B: Halpha/2.86, Osterbrock & Ferland 2006) added
    as narrow Gaussians to the continuum change each band's <f_nu> as a direct numerical
    integration of that spectrum does; [OIII] and [OII] switched off."""
    par = lines.LineParameters(oiii_hbeta=0.0, oii_hbeta=0.0)
    phot = _photometry.Photometry(BANDS, 4, _photometry.Distances(0.5, 4.0, None), par)
    z, m_uv, beta, brk, bopt = 2.5, -21.0, -2.0, 1.25, -1.0
    ew_ha = 400.0
    a = [np.array([v]) for v in (z, m_uv, beta, brk, bopt)]
    with_l = phot.mags(*a, ew_halpha=np.array([ew_ha]))[0]
    without = phot.mags(*a)[0]
    gain = 10 ** (-0.4 * (with_l - AB_NJY_ZERO)) - 10 ** (-0.4 * (without - AB_NJY_ZERO))

    wave = np.linspace(800.0, 4200.0, 400001)  # nm, 0.0085 nm steps
    cont = galaxy_fnu(wave, [z], [m_uv], [beta], [brk], [bopt])[0]
    c_nm_s = 2.99792458e17
    flam = cont * c_nm_s / wave**2  # nJy nm/s per nm: f_lambda = c f_nu / lambda^2
    line_flam = np.zeros_like(wave)
    for rest, frac in ((656.28, 1.0), (486.13, 1.0 / 2.86)):
        lo = rest * (1 + z)
        f_cont_lo = np.interp(lo, wave, flam)
        # Halpha flux = EW_obs x f_lambda,cont at Halpha; Hbeta = Halpha / 2.86
        f_ha = ew_ha * 0.1 * (1 + z) * np.interp(656.28 * (1 + z), wave, flam)
        sig = 0.3  # nm, narrow against every band
        line_flam += frac * f_ha * np.exp(-0.5 * ((wave - lo) / sig) ** 2) / (
            np.sqrt(2 * np.pi) * sig)
        assert f_cont_lo > 0
    line_fnu = line_flam * wave**2 / c_nm_s
    expect = np.array([_synthetic_fnu(b, wave, line_fnu) for b in BANDS])
    assert expect[2] > 0 and expect[3] > 0  # Hbeta in b17 (1701 nm), Halpha in b23 (2297 nm)
    assert_allclose(gain, expect, rtol=2e-3, atol=1e-9 * expect.max())


def test_ew_relation_follows_one_plus_z_power():
    """Median EW(Halpha) = a (1+z)^1.8 (Fumagalli et al. 2012, ApJ 757, L22 [mem]): 20 A x
    3^1.8 = 145 A at z = 2, held beyond z_cap = 6."""
    par = lines.LineParameters()
    assert_allclose(lines.halpha_ew_relation([0.0, 2.0, 6.0, 9.0], par),
                    20.0 * np.array([1.0, 3.0**1.8, 7.0**1.8, 7.0**1.8]), rtol=1e-12)


def test_drawn_ew_scatter_is_lognormal():
    """log10 EW(Halpha) about the relation is normal with sigma = scatter_dex (scipy KS test;
    deviates beyond the +-3 sigma clip are rare enough not to matter at 2000 draws)."""
    par = lines.LineParameters(ew_max=1e9)
    rng = np.random.default_rng(4)
    z = rng.uniform(1, 5, 2000)
    ew = lines.draw_halpha_ew(z, par, rng.standard_normal(z.size))
    resid = np.log10(ew / lines.halpha_ew_relation(z, par)) / par.scatter_dex
    assert stats.kstest(resid, "norm").pvalue > 1e-3


def test_lines_brighten_high_z_galaxies_in_the_line_bands():
    """With lines on, the light cone's star-forming galaxies at z = 5.4-6.8 ([OIII] 500.7 in
    b36, 3.2-4.0 micron) are brighter in b36 than their continuum alone: a rest EW of several
    hundred A, x (1 + z) ~ 7, against the band's ~800 nm width is > 0.1 mag (median)."""
    kw = dict(mag_limit=29.5, z_min=5.4, z_max=6.8, abs_mag_faint=-18.0, star_density_arcmin2=0.0,
              dwarf_density_arcmin2=0.0, dusty_density_arcmin2=0.0, quiescent_density_arcmin2=0.0)
    on = make_population(_pop(**kw), BANDS, (-60, 60), (-60, 60), stream(3, "population"))
    sf = on[on["template"] == "starforming"]
    assert len(sf) > 20
    phot = _photometry.Photometry(BANDS, 4, _photometry.Distances(5.0, 7.0, None))
    cont = phot.mags(np.asarray(sf["redshift"]), np.asarray(sf["abs_mag_uv"]),
                     np.asarray(sf["beta_uv"]), np.asarray(sf["break_strength"]),
                     np.asarray(sf["beta_opt"]))[:, 4]
    dm = cont - np.asarray(sf["mag_b36"])
    assert np.all(dm > 0) and np.median(dm) > 0.1
    assert np.all(sf["ew_oiii_hbeta"] > sf["ew_halpha"] * 0.5)


# ------------------------------------------------------------------------------------------
# cool dwarfs
# ------------------------------------------------------------------------------------------
# Vega (MKO) ranges [mem], read off Dupuy & Liu 2012 (J-H, H-K) and Patten et al. 2006 (K-[3.6]),
# wide enough for the scatter at each type: (code, J-H, H-K)
_DWARF_RANGES = [
    (17.0, (0.45, 0.80), (0.25, 0.50)),    # M7
    (20.0, (0.55, 0.90), (0.35, 0.65)),    # L0
    (25.0, (0.75, 1.30), (0.50, 0.95)),    # L5
    (30.0, (0.70, 1.20), (0.45, 0.90)),    # T0
    (35.0, (-0.30, 0.40), (-0.30, 0.20)),  # T5
    (38.0, (-0.60, 0.00), (-0.50, 0.10)),  # T8
]


@pytest.mark.parametrize("code,jh,hk", _DWARF_RANGES)
def test_dwarf_colours_in_published_ranges(code, jh, hk):
    """b13-b17 and b17-b23 (AB) turned to Vega with Hewett et al. 2006 offsets fall in the
    published J-H and H-K ranges of the type [mem]."""
    m = dwarfs.dwarf_band_magnitudes(np.array([25.0]), np.array([code]), BANDS)[0]
    j_h = (m[1] - m[2]) - (J_AB - H_AB)
    h_k = (m[2] - m[3]) - (H_AB - K_AB)
    assert jh[0] <= j_h <= jh[1], dwarfs.spectral_type_name(code)
    assert hk[0] <= h_k <= hk[1], dwarfs.spectral_type_name(code)


def test_dwarf_k_minus_36_rises_from_m_to_t():
    """K-[3.6] grows from late M (~0.2-0.4) through L to late T (> 1.2) (Patten et al. 2006,
    fig. of K_s-[3.6] vs type [mem])."""
    codes = np.array([17.0, 25.0, 38.0])
    m = dwarfs.dwarf_band_magnitudes(np.zeros(3), codes, BANDS)
    k_36 = (m[:, 3] - m[:, 4]) - (K_AB - I1_AB)
    assert np.all(np.diff(k_36) > 0)
    assert 0.1 < k_36[0] < 0.5 and k_36[2] > 1.2


def test_dwarfs_are_normalised_in_the_j_like_band():
    """mag in the band nearest 1248 nm is the drawn one (b13 here)."""
    assert dwarfs.j_like_band(BANDS) == 1
    m = dwarfs.dwarf_band_magnitudes(np.array([24.0, 27.5]), np.array([20.0, 34.5]), BANDS)
    assert_allclose(m[:, 1], [24.0, 27.5], atol=1e-12)


def test_spectral_type_fractions_chi_square():
    """Class fractions M7-M9.5 / L / T follow the configured ones (scipy chi-square)."""
    st = dwarfs.draw_spectral_types(20000, [0.6, 0.25, 0.15], np.random.default_rng(2))
    counts = [np.sum(st < 20), np.sum((st >= 20) & (st < 30)), np.sum(st >= 30)]
    assert stats.chisquare(counts, 20000 * np.array([0.6, 0.25, 0.15])).pvalue > 1e-3
    assert st.min() >= 17 and st.max() <= 38 and np.all(st * 2 == np.round(st * 2))
    assert dwarfs.spectral_type_name(25.5) == "L5.5" and dwarfs.spectral_type_name(17) == "M7"


# ------------------------------------------------------------------------------------------
# the population table
# ------------------------------------------------------------------------------------------
_BIG = dict(mag_limit=20.0, z_max=3.0, star_density_arcmin2=0.0, dwarf_density_arcmin2=2.0,
            dusty_density_arcmin2=2.0, quiescent_density_arcmin2=2.0)


@pytest.fixture(scope="module")
def big():
    """100 arcmin^2 with 2 sources per arcmin^2 of each family and a bright light-cone limit."""
    return make_population(_pop(**_BIG), BANDS, (-300, 300), (-300, 300),
                           stream(11, "population"))


@pytest.mark.parametrize("kind", ["dwarf", "dusty", "quiescent"])
def test_counts_per_family_match_density(big, kind):
    """N of each family is Poisson with mean density x area: two-sided p > 1e-4 (scipy)."""
    n = int(np.sum(big["kind"] == kind))
    mu = 2.0 * 100.0
    p = 2 * min(stats.poisson.cdf(n, mu), stats.poisson.sf(n - 1, mu))
    assert p > 1e-4, (kind, n, mu)


def test_family_ranges_and_columns(big):
    """Each family sits inside its configured magnitude and redshift ranges, carries its
    parameters, and galaxies carry the shape columns a profile needs."""
    p = _pop(**_BIG)
    d = big[big["kind"] == "dusty"]
    q = big[big["kind"] == "quiescent"]
    w = big[big["kind"] == "dwarf"]
    assert np.all((d["mag_b36"] >= p.dusty_mag_min - 1e-9) & (d["mag_b36"] <= p.dusty_mag_max))
    assert np.all((d["redshift"] >= p.dusty_z_min) & (d["redshift"] <= p.dusty_z_max))
    assert np.all((q["redshift"] >= p.quiescent_z_min) & (q["redshift"] <= p.quiescent_z_max))
    assert np.all((w["mag_b13"] >= 20.0) & (w["mag_b13"] <= 29.0))
    assert np.all(d["dust_av"] >= 0.3) and 1.3 < np.median(d["dust_av"]) < 3.0
    assert np.all(d["ew_halpha"] > 0) and np.all(q["ew_halpha"] == 0)
    assert np.all(np.isfinite(w["spectral_type"])) and np.all(np.isnan(w["dust_av"]))
    # quiescent: compact (r_e < 3 kpc for nearly all) with strong breaks
    assert np.median(q["r_half_kpc"]) < 1.0 and np.all(q["break_strength"] >= 1.8)
    for row in (d[0], q[0]):
        prof = make_profile(row)
        assert isinstance(prof, galsim.GSObject)
        assert_allclose(prof.flux, 1.0, rtol=1e-6)
    assert isinstance(make_profile(w[0]), galsim.DeltaFunction)


def test_dusty_galaxies_are_redder_than_dust_free_ones(big):
    """Dust reddens: at A_V ~ 2 the b10-b36 colour of dusty galaxies exceeds 1 mag for most
    (Calzetti: A(0.3 um)/A(0.9 um) ~ 2.2 at z = 2, so Delta colour ~ 0.6 A_V or more)."""
    d = big[big["kind"] == "dusty"]
    assert np.median(d["mag_b10"] - d["mag_b36"]) > 1.0


def test_seeded_reproducibility():
    """The same stream gives an identical table; another seed a different one."""
    # 50 of each kind per arcmin^2: every kind present in the 0.44 arcmin^2 (P(none) ~ 1e-10)
    kw = dict(mag_limit=26.0, dwarf_density_arcmin2=50.0, dusty_density_arcmin2=50.0,
              quiescent_density_arcmin2=50.0, star_density_arcmin2=50.0)
    a = make_population(_pop(**kw), BANDS, (-20, 20), (-20, 20), stream(5, "population"))
    b = make_population(_pop(**kw), BANDS, (-20, 20), (-20, 20), stream(5, "population"))
    c = make_population(_pop(**kw), BANDS, (-20, 20), (-20, 20), stream(6, "population"))
    assert set(np.unique(a["kind"])) == {"galaxy", "star", "dwarf", "dusty", "quiescent"}
    for name in a.colnames:
        np.testing.assert_array_equal(a[name], b[name])
    assert len(a) != len(c) or not np.array_equal(a["x_arcsec"], c["x_arcsec"])


def test_contaminants_leave_the_light_cone_unchanged():
    """Switching the families off changes no light-cone galaxy or star (they draw last).

    With uniform placement: clustered positions of all field galaxies come from shared
    density fields (the families live in the same structures), so the families move the
    light cone's positions there; its other columns stay (tests/test_clustering.py)."""
    kw = dict(mag_limit=26.0, dwarf_density_arcmin2=50.0, dusty_density_arcmin2=50.0,
              quiescent_density_arcmin2=50.0, placement="uniform")
    off = dict(kw, dwarf_density_arcmin2=0.0, dusty_density_arcmin2=0.0,
               quiescent_density_arcmin2=0.0)
    a = make_population(_pop(**kw), BANDS, (-20, 20), (-20, 20), stream(5, "population"))
    b = make_population(_pop(**off), BANDS, (-20, 20), (-20, 20), stream(5, "population"))
    a = a[np.isin(a["kind"], ["galaxy", "star"])]
    for name in ("x_arcsec", "mag_b36", "redshift", "r_half", "bulge_fraction", "bt_b10"):
        np.testing.assert_array_equal(a[name], b[name])


def test_line_switch_off_gives_zero_ews():
    """emission_lines=false: no lines (EWs 0) and line_parameters is None."""
    assert line_parameters(_pop(emission_lines=False)) is None
    t = make_population(_pop(mag_limit=25.0, emission_lines=False), BANDS, (-20, 20),
                        (-20, 20), stream(1, "population"))
    g = t[t["kind"] == "galaxy"]
    assert np.all(g["ew_halpha"] == 0) and np.all(g["ew_oiii_hbeta"] == 0)


# ------------------------------------------------------------------------------------------
# refusals
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("override,key", [
    ("population.dwarf_density_arcmin2=-1", "population.dwarf_density_arcmin2"),
    ("population.dwarf_mag_max=15", "population.dwarf_mag_max"),
    ("population.dwarf_count_slope=3", "population.dwarf_count_slope"),
    ("population.dwarf_type_fractions=[1,1]", "population.dwarf_type_fractions"),
    ("population.dwarf_type_fractions=[0,0,0]", "population.dwarf_type_fractions"),
    ("population.dusty_density_arcmin2=nan", "population.dusty_density_arcmin2"),
    ("population.dusty_z_max=1.2", "population.dusty_z_max"),
    ("population.dusty_av_median=10", "population.dusty_av_median"),
    ("population.dusty_av_sigma_dex=-0.1", "population.dusty_av_sigma_dex"),
    ("population.quiescent_density_arcmin2=5000", "population.quiescent_density_arcmin2"),
    ("population.quiescent_z_max=1.5", "population.quiescent_z_max"),
    ("population.quiescent_break=1.2", "population.quiescent_break"),
    ("population.quiescent_mag_min=5", "population.quiescent_mag_min"),
    ("population.ew_halpha_a=-5", "population.ew_halpha_a"),
    ("population.ew_halpha_slope=9", "population.ew_halpha_slope"),
    ("population.ew_scatter_dex=2", "population.ew_scatter_dex"),
    ("population.ew_halpha_max=1e5", "population.ew_halpha_max"),
    ("population.oiii_hbeta_ratio=-1", "population.oiii_hbeta_ratio"),
    ("population.oii_hbeta_ratio=50", "population.oii_hbeta_ratio"),
])
def test_bad_contaminant_values_are_refused(override, key):
    """A bad value raises ConfigError naming the key, the value and what is allowed, in one
    line."""
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")) as err:
        make_scenario(override)
    assert "\n" not in str(err.value) and ("must" in str(err.value))


def test_uniform_preset_switches_families_off():
    """population=uniform draws no contaminant family."""
    sc = make_scenario("population=uniform")
    p = sc.population
    assert p.dwarf_density_arcmin2 == p.dusty_density_arcmin2 == 0
    assert p.quiescent_density_arcmin2 == 0


# ------------------------------------------------------------------------------------------
# end to end
# ------------------------------------------------------------------------------------------
def test_quick_run_has_every_kind_renders_them_and_scores_galaxies_only(tmp_path):
    """survey=quick (10" field, two bands) with the families' densities raised so each shows
    up: the run completes, SOURCES holds every kind, the noiseless image holds the light of
    every source (0.5%, as tests/test_pipeline.py checks for the light cone), and galaxy
    completeness counts no point source (star, dwarf)."""
    from astropy.io import fits
    from astropy.table import Table

    from simfield.io import COMPLETE_MARKER
    from simfield.pipeline import run_scenario

    sc = make_scenario("survey=quick", "survey.width_arcsec=10", "survey.height_arcsec=10",
                       "telescope.psf.spike_radius_arcsec=2.0",
                       "telescope.psf.core_radius_arcsec=1.0", "score.report=false",
                       "selection=none", "photoz.enabled=false",  # neither is examined
                       "population.star_density_arcmin2=400",
                       "population.dwarf_density_arcmin2=400",
                       "population.dusty_density_arcmin2=400",
                       "population.quiescent_density_arcmin2=400")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name in ("b13", "b23")]
    res = run_scenario(sc, tmp_path / "run")
    out = res.out_dir
    assert (out / COMPLETE_MARKER).exists()
    src = Table.read(out / "truth.fits", hdu="SOURCES")
    kinds = np.asarray(src["kind"]).astype(str)
    assert {"galaxy", "star", "dwarf", "dusty", "quiescent"} <= set(kinds)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["n_per_kind"]["dwarf"] == int(np.sum(kinds == "dwarf")) > 0
    assert set(summary["n_per_kind"]) == {"galaxy", "star", "dwarf", "dusty", "quiescent",
                                          "member", "icl"}
    assert src["spectral_type"].unit is None or str(src["spectral_type"].unit) == ""
    assert str(src["ew_halpha"].unit) == "Angstrom" and str(src["dust_av"].unit) == "mag"

    with fits.open(out / "truth_image_b23.fits") as hl:
        img, zp = hl["IMAGE"].data.astype(float), hl["IMAGE"].header["ZP_AB"]
    ny, nx = img.shape
    m = 50
    box = img[m:ny - m, m:nx - m].sum()
    x, y = np.asarray(src["x"]), np.asarray(src["y"])
    inner = (x > m + 25) & (x < nx - m - 25) & (y > m + 25) & (y < ny - m - 25)
    outer = (x > m - 25) & (x < nx - m + 25) & (y > m - 25) & (y < ny - m + 25)
    rate = np.nan_to_num(10 ** (-0.4 * (np.asarray(src["mag_b23"], float) - zp)))
    assert rate[inner].sum() * 0.995 <= box <= rate[outer].sum() * 1.005
    fam = np.isin(kinds, ["dwarf", "dusty", "quiescent"])
    assert rate[inner & fam].sum() > 0.01 * rate[inner].sum()  # the families' light counts

    band = sc.detection_bands[0]
    rec = Table.read(out / "score" / band / "recovered.ecsv")
    comp = Table.read(out / "score" / band / "completeness_mag.ecsv")
    rk = np.asarray(rec["kind"]).astype(str)
    mag = np.asarray(rec["mag_obs"], float)
    in_range = np.isfinite(mag) & (mag >= sc.score.mag_min) & (mag < sc.score.mag_max)
    assert np.sum(in_range & (rk == "dwarf")) > 0  # so counting them would show
    assert int(np.sum(comp["n"])) == int(np.sum(in_range & ~np.isin(rk, ["star", "dwarf"])))
