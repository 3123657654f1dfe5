"""Tests of simfield.population against published formulas and reference libraries.

Comparison to outside sources (each test names its own):
- Hogg 1999, astro-ph/9905116 (distances, volume element) by direct quadrature (scipy).
- Schechter 1976, ApJ 203, 297 and Bouwens et al. 2015, ApJ 803, 34 (luminosity function),
  integrated with scipy.integrate.quad.
- Madau 1995, ApJ 441, 18 (IGM), re-written here.
- Oke & Gunn 1983, ApJ 266, 713 (AB), astropy constants (photon rates).
- Ciotti & Bertin 1999, A&A 352, 447 (Sersic b_n series), scipy.special.gammaincinv, GalSim.
- Deep near-infrared galaxy counts [mem].
- astropy.modeling BlackBody (star colours).
"""

from __future__ import annotations

import dataclasses

import galsim
import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from astropy.cosmology import FlatLambdaCDM
from astropy.modeling.physical_models import BlackBody
from numpy.testing import assert_allclose
from scipy import integrate, special, stats

from simfield import cosmo as sf_cosmo
from simfield.bands import Band, ab_to_njy, make_band, njy_to_ab
from simfield.config import PopulationConfig
from simfield.errors import ConfigError
from simfield.population import _photometry, luminosity, morphology, seds, stars
from simfield.population import make_population, make_profile

C_KMS = const.c.to(u.km / u.s).value
BANDS = [make_band("b10", 1000, 220, 0.30), make_band("b13", 1300, 290, 0.35),
         make_band("b17", 1700, 380, 0.40), make_band("b23", 2300, 520, 0.42),
         make_band("b36", 3600, 800, 0.45)]


def _pop(**kw) -> PopulationConfig:
    return dataclasses.replace(PopulationConfig(), **kw)


# ------------------------------------------------------------------------------------------
# cosmology: Hogg 1999, eqs. 14-16, 21, 25, 28
# ------------------------------------------------------------------------------------------
def _hogg(z, h0=70.0, om=0.3, orad=0.0):
    """(D_C, D_L, dV/dz/dOmega) in Mpc, Mpc, Mpc^3/sr from Hogg 1999 eqs. 14-15, 21, 28."""
    ol = 1.0 - om - orad
    e = lambda x: np.sqrt(om * (1 + x) ** 3 + orad * (1 + x) ** 4 + ol)  # noqa: E731
    dh = C_KMS / h0
    dc = dh * integrate.quad(lambda x: 1.0 / e(x), 0.0, z, epsabs=0, epsrel=1e-11)[0]
    return dc, (1 + z) * dc, dh * dc**2 / e(z)


@pytest.mark.parametrize("z", [0.3, 1.0, 3.0, 7.0, 12.0])
def test_distance_modulus_and_volume_hogg(z):
    """DM and dV/dz/dOmega of simfield.cosmo equal the Hogg 1999 integrals (eqs. 15, 21, 25, 28)."""
    c0 = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=0.0)
    _, dl, dv = _hogg(z)
    assert_allclose(sf_cosmo.distance_modulus(z, c0), 5 * np.log10(dl * 1e5), atol=1e-6)
    assert_allclose(sf_cosmo.comoving_volume_element(z, c0) * sf_cosmo.ARCSEC2_PER_SR, dv,
                    rtol=1e-7)
    # default cosmology has radiation; Omega_r from astropy (reference library) in Hogg's E(z)
    cd = sf_cosmo.default_cosmology()
    _, dl_r, dv_r = _hogg(z, orad=cd.Ogamma0 + cd.Onu0)
    assert_allclose(sf_cosmo.distance_modulus(z), 5 * np.log10(dl_r * 1e5), atol=1e-6)
    assert_allclose(sf_cosmo.comoving_volume_element(z) * sf_cosmo.ARCSEC2_PER_SR, dv_r,
                    rtol=1e-7)


def test_tabulated_distances_match_astropy():
    """The light cone's spline of D_A agrees with astropy to 1e-5 mag in DM (reference library)."""
    cd = sf_cosmo.default_cosmology()
    tab = _photometry.Distances(0.2, 15.0, cd)
    z = np.linspace(0.2, 15.0, 777)
    assert_allclose(tab.dm(z), cd.distmod(z).value, atol=1e-5)
    assert_allclose(tab.d_a(z), cd.angular_diameter_distance(z).value, rtol=1e-5)


# ------------------------------------------------------------------------------------------
# luminosity function
# ------------------------------------------------------------------------------------------
def _bouwens(z):
    """Bouwens et al. 2015, ApJ 803, 34, sect. 5.1 evolution fit (written out here)."""
    return -20.95 + 0.01 * (z - 6), 0.47e-3 * 10 ** (-0.27 * (z - 6)), -1.87 - 0.10 * (z - 6)


def _schechter(m, ms, ps, al):
    """Schechter 1976 in magnitudes (Mpc^-3 mag^-1)."""
    x = 10 ** (-0.4 * (m - ms))
    return 0.4 * np.log(10) * ps * x ** (al + 1) * np.exp(-x)


@pytest.mark.parametrize("z", [4.5, 5.0, 6.0, 8.0, 10.0])
def test_lf_parameters_follow_bouwens2015(z):
    """M*, phi*, alpha at z >= 4.5 equal the Bouwens et al. 2015 evolution fit."""
    p = luminosity.uv_lf_parameters(z)
    ms, ps, al = _bouwens(z)
    assert_allclose([p.m_star, p.phi_star, p.alpha], [ms, ps, al], rtol=1e-12)


#: Parsa et al. 2016, MNRAS 456, 3194, Table 2: binned rest-1500 A luminosity function
#: (Mpc^-3 mag^-1) in 0.5-mag bins from the first M_UV, read in a stored copy (repository
#: mirochaj/ares, file ares/data/parsa2016.py); typed here for -21 <= M_UV <= -16.
_PARSA2016 = {
    1.9: (-21.0, [0.000152, 0.000555, 0.001654, 0.003467, 0.004961, 0.006454, 0.007849,
                  0.010007, 0.01256, 0.01432, 0.01766]),
    2.8: (-21.0, [0.000462, 0.001462, 0.002511, 0.00383, 0.004387, 0.007382, 0.008353,
                  0.012432, 0.012238, 0.012821, 0.015599]),
    3.8: (-21.0, [0.000475, 0.001087, 0.001709, 0.001916, 0.00211, 0.004008, 0.005485,
                  0.007384, 0.01603, 0.010337, 0.01351]),
}


@pytest.mark.parametrize("z", sorted(_PARSA2016))
def test_rest_uv_function_at_z2_4_against_parsa2016_bins(z):
    """The rest-UV function's galaxies from M_UV = -21.25 to -15.75 at the mean redshifts of
    Parsa et al. 2016 (Table 2, read) within 25 % of their binned densities summed (their
    bins' errors are 5-10 %; the interpolation between nodes and the Schechter shape leave the
    rest): achieved 1.02, 0.79 and 0.94 at z = 1.9,
    2.8 and 3.8, so these functions are not what sets the 1.6 um counts at AB 26.5-28
    (test_number_counts_near_infrared)."""
    m0, phi = _PARSA2016[z]
    hi = m0 + 0.5 * len(phi) - 0.25
    model = integrate.quad(lambda m: float(luminosity.uv_luminosity_function(m, z)), m0 - 0.25,
                           hi)[0]
    assert abs(model / (0.5 * np.sum(phi)) - 1.0) < 0.25, model / (0.5 * np.sum(phi))


@pytest.mark.parametrize("s", [-1.8, -1.3, -1.0, -0.6, -1e-12, 0.0, 0.4, 1.5])
@pytest.mark.parametrize("x", [1e-3, 0.05, 1.0, 4.0])
def test_upper_incomplete_gamma_quadrature(s, x):
    """Gamma(s, x) for negative s equals int_x^inf t^(s-1) e^-t dt (scipy quad, A&S 6.5.3)."""
    ref = integrate.quad(lambda t: t ** (s - 1) * np.exp(-t), x, 1.0, epsrel=1e-12, limit=200)[0] \
        + integrate.quad(lambda t: t ** (s - 1) * np.exp(-t), 1.0, np.inf, epsrel=1e-12)[0] \
        if x < 1 else integrate.quad(lambda t: t ** (s - 1) * np.exp(-t), x, np.inf,
                                     epsrel=1e-12)[0]
    assert_allclose(luminosity.upper_incomplete_gamma(s, x), ref, rtol=2e-7)


@pytest.mark.parametrize("z", [0.5, 2.0, 4.0, 6.0, 9.0, 12.0])
def test_number_density_equals_integral_of_phi(z):
    """n(<M) = phi* Gamma(alpha+1, L/L*) equals the quad integral of the Schechter function."""
    p = luminosity.uv_lf_parameters(z)
    ms, ps, al = float(p.m_star), float(p.phi_star), float(p.alpha)
    if z >= 4.5:
        assert_allclose([ms, ps, al], _bouwens(z), rtol=1e-12)
    for m in (-22.0, -19.0, -16.0, -13.0):
        ref = integrate.quad(_schechter, ms - 10, m, args=(ms, ps, al), epsrel=1e-11,
                             limit=200)[0]
        assert_allclose(luminosity.number_density_brighter(m, z), ref, rtol=1e-6)


def test_expected_counts_double_integral():
    """Light-cone count equals int dz dV/dz dOmega int phi dM (quad over z with astropy)."""
    cd = sf_cosmo.default_cosmology()
    area = 3600.0
    sr = area / sf_cosmo.ARCSEC2_PER_SR

    def dndz(z):
        ms, ps, al = _bouwens(z)
        n = integrate.quad(_schechter, ms - 10, -17.0, args=(ms, ps, al), epsrel=1e-10)[0]
        return n * cd.differential_comoving_volume(z).value * sr

    ref = integrate.quad(dndz, 4.5, 9.0, epsrel=1e-8)[0]
    got = luminosity.expected_counts(4.5, 9.0, -17.0, area, cosmo=cd)
    assert_allclose(got, ref, rtol=2e-3)  # midpoint rule over 300 cells in ln(1+z)


def test_drawn_magnitudes_follow_phi():
    """Drawn (z, M) follow phi(M) dV/dz (KS against quad of Schechter x astropy volume)."""
    cd = sf_cosmo.default_cosmology()
    z0, z1, mf = 5.5, 6.5, -16.0
    draw = luminosity.draw_redshift_magnitude(z0, z1, mf, 3.0e5, np.random.default_rng(11),
                                              cosmo=cd)
    assert 2000 < draw.redshift.size < 40000
    zz = np.linspace(z0, z1, 41)
    wz = cd.differential_comoving_volume(zz).value

    def cdf_m(m):
        m = np.atleast_1d(m)
        out = []
        for mi in m:
            num = [integrate.quad(_schechter, _bouwens(z)[0] - 8, min(mi, mf),
                                  args=_bouwens(z))[0] for z in zz]
            out.append(np.trapezoid(np.array(num) * wz, zz))
        return np.array(out)

    grid = np.linspace(-25.0, mf, 120)
    cdf = cdf_m(grid)
    cdf /= cdf[-1]
    ks = stats.kstest(draw.abs_mag, lambda m: np.interp(m, grid, cdf))
    assert ks.pvalue > 0.01, ks
    # redshifts: n(<M_f, z) dV/dz
    nz = np.array([integrate.quad(_schechter, _bouwens(z)[0] - 8, mf, args=_bouwens(z))[0]
                   for z in zz]) * wz
    cz = np.concatenate([[0], np.cumsum(0.5 * (nz[1:] + nz[:-1]) * np.diff(zz))])
    ks_z = stats.kstest(draw.redshift, lambda z: np.interp(z, zz, cz / cz[-1]))
    assert ks_z.pvalue > 0.01, ks_z


# ------------------------------------------------------------------------------------------
# spectra and photometry
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("mag", [20.0, 27.3, 31.0])
def test_flat_fnu_synthetic_photometry(mag):
    """A flat f_nu spectrum has the same AB magnitude in every band (Oke & Gunn 1983)."""
    wave = seds.wave_grid(BANDS)
    f = np.full((2, wave.size), 10 ** (-0.4 * (mag - 31.4)))
    assert_allclose(seds.band_magnitudes(wave, f, BANDS), mag, atol=1e-10)


def test_galaxy_normalisation_flat_spectrum():
    """beta = -2 (flat f_nu) galaxy: m = M + DM(z) - 2.5 log10(1+z) in every band (Hogg 1999)."""
    cd = sf_cosmo.default_cosmology()
    wave = seds.wave_grid(BANDS)
    z = np.array([3.0, 3.2])  # all bands between rest 150 and 1200 nm, no break
    m_uv = np.array([-20.0, -17.5])
    f = seds.galaxy_fnu(wave, z, m_uv, beta=[-2, -2], break_strength=[1, 1],
                        beta_opt=[-2, -2], igm=False)
    expected = m_uv + cd.distmod(z).value - 2.5 * np.log10(1 + z)
    assert_allclose(seds.band_magnitudes(wave, f, BANDS), expected[:, None] + 0 * f[:, :5],
                    atol=1e-8)


def test_power_law_colour():
    """f_lambda ~ lambda^beta gives band colours of the integral of lambda^(beta+2) T dl/l."""
    wave = seds.wave_grid(BANDS)
    z, beta = 6.5, -2.4
    f = seds.galaxy_fnu(wave, [z], [-20.0], [beta], [1.0], [beta], igm=False)
    mags = seds.band_magnitudes(wave, f, BANDS)[0]
    ref = []
    for b in BANDS[1:4]:  # rest 150-380 nm at z = 6.5
        num = integrate.trapezoid(b.wave ** (beta + 2) * b.throughput / b.wave, b.wave)
        den = integrate.trapezoid(b.throughput / b.wave, b.wave)
        ref.append(-2.5 * np.log10(num / den / (150.0 * (1 + z)) ** (beta + 2)))
    m1500 = -20.0 + sf_cosmo.distance_modulus(z) - 2.5 * np.log10(1 + z)
    assert_allclose(mags[1:4] - m1500, ref, atol=2e-4)  # grid vs band sampling


def _madau(lam, z):
    """Madau 1995, ApJ 441, 18, eqs. 12-15 and footnote 3, written out independently."""
    lines = [(121.567, 3.6e-3), (102.572, 1.7e-3), (97.254, 1.2e-3), (94.974, 9.3e-4)]
    tau = 0.0
    for lj, aj in lines:
        if lj < lam < lj * (1 + z):
            tau += aj * (lam / lj) ** 3.46
    if lam < 91.18 * (1 + z):
        xc, xe = lam / 91.18, 1 + z
        tau += (0.25 * xc**3 * (xe**0.46 - xc**0.46) + 9.4 * xc**1.5 * (xe**0.18 - xc**0.18)
                - 0.7 * xc**3 * (xc**-1.32 - xe**-1.32) - 0.023 * (xe**1.68 - xc**1.68))
    return np.exp(-tau)


@pytest.mark.parametrize("z", [3.0, 5.7, 8.0, 11.0])
def test_igm_transmission_madau1995(z):
    """IGM transmission equals the Madau 1995 formula at wavelengths across the series."""
    lam = np.linspace(80.0 * (1 + z), 130.0 * (1 + z), 301)
    ref = np.array([_madau(x, z) for x in lam])
    got = seds.igm_transmission(lam, z)
    assert_allclose(got, ref, rtol=1e-10, atol=1e-300)
    # 2-D form (n_gal, n_wave)
    assert_allclose(seds.igm_transmission(lam, np.array([z, z]))[1], ref, rtol=1e-10)


@pytest.mark.parametrize("z", [6.0, 7.5, 9.0])
def test_dropout_rule(z):
    """Dropout rule (common practice; Madau 1995): forest suppressed, Lyman continuum ~0."""
    lam = np.linspace(75.0 * (1 + z), 160.0 * (1 + z), 3000)
    args = (lam, [z], [-20.0], [-2.0], [1.0], [-2.0])
    f = seds.galaxy_fnu(*args)[0]  # default: no ionising photons escape the galaxy
    f_igm_only = seds.galaxy_fnu(*args, lyc_escape=1.0)[0]
    f0 = seds.galaxy_fnu(*args, igm=False, lyc_escape=1.0)[0]
    forest = (lam > 100.0 * (1 + z)) & (lam < 121.0 * (1 + z))
    lyc = lam < 91.0 * (1 + z)
    red = lam > 122.0 * (1 + z)
    assert np.mean(f[forest] / f0[forest]) < 0.15  # Madau 1995: 0.10 at z = 6, falling fast
    assert np.all(f[lyc] < 1e-6 * f0[red].min())
    assert np.mean(f_igm_only[lyc] / f0[lyc]) < 3e-3  # IGM alone: Lyman-continuum opacity
    assert_allclose(f[red], f0[red], rtol=1e-12)


def test_ab_and_photon_rate_by_hand():
    """AB zero point and e-/s per nJy of a top-hat band equal a hand calculation (astropy)."""
    assert_allclose(ab_to_njy(0.0), 3631e9, rtol=1e-4)  # Oke & Gunn 1983: 3631 Jy at AB = 0
    assert_allclose(njy_to_ab(3631e9), 0.0, atol=1e-4)
    lam = np.linspace(1000.0, 1200.0, 20001)
    band = Band("box", lam, np.full(lam.size, 0.5))
    area = 20.0
    # N = A f_nu / h * int T dlambda / lambda with f_nu = 1 nJy = 1e-35 W m^-2 Hz^-1
    ref = area * 1e-35 / const.h.si.value * 0.5 * np.log(1.2)
    assert_allclose(band.rate_per_njy(area), ref, rtol=1e-8)
    assert_allclose(band.zeropoint(area), 31.4 + 2.5 * np.log10(ref), rtol=1e-10)


# ------------------------------------------------------------------------------------------
# morphology
# ------------------------------------------------------------------------------------------
def _ciotti_bertin(n):
    """Ciotti & Bertin 1999, A&A 352, 447, eq. 18 asymptotic series of b_n."""
    return (2 * n - 1 / 3 + 4 / (405 * n) + 46 / (25515 * n**2) + 131 / (1148175 * n**3)
            - 2194697 / (30690717750 * n**4))


@pytest.mark.parametrize("n", [0.5, 1.0, 1.5, 2.5, 4.0, 6.0])
def test_sersic_bn(n):
    """Sersic b_n: gammaincinv vs Ciotti & Bertin 1999 eq. 18 vs GalSim's r_e / r_0."""
    bn = special.gammaincinv(2 * n, 0.5)
    # the series is asymptotic in 1/n: ~3e-5 at n = 1, ~1e-3 at n = 0.5
    assert_allclose(bn, _ciotti_bertin(n), rtol=2e-3 if n < 1 else 5e-5)
    s = galsim.Sersic(n, half_light_radius=1.0)
    assert_allclose((1.0 / s.scale_radius) ** (1.0 / n), bn, rtol=1e-4)


@pytest.mark.parametrize("n", [0.8, 1.5, 3.5, 6.0])
def test_profile_truncated_half_light(n):
    """make_profile: unit flux, and half the truncated light inside r_e (regularised gammainc)."""
    row = dict(kind="galaxy", r_half=0.2, sersic_n=n, axis_ratio=1.0, position_angle=0.0,
               knot_fraction=0.0, n_knots=0, knot_seed=1)
    prof = make_profile(row)
    assert_allclose(prof.flux, 1.0, rtol=1e-12)
    r0 = prof.scale_radius
    enclosed = lambda r: special.gammainc(2 * n, (r / r0) ** (1 / n))  # noqa: E731
    ratio = enclosed(0.2) / enclosed(morphology.TRUNCATION_RADII * 0.2)
    assert_allclose(ratio, 0.5, atol=1e-4)


def test_profile_orientation_and_knots():
    """PA = 0 is elongated along y (north) by galsim.hsm moments; knots keep unit flux."""
    row = dict(kind="galaxy", r_half=0.3, sersic_n=1.0, axis_ratio=0.4, position_angle=0.0,
               knot_fraction=0.0, n_knots=0, knot_seed=3)
    img = make_profile(row).drawImage(nx=96, ny=96, scale=0.02)
    mom = galsim.hsm.FindAdaptiveMom(img)
    assert mom.observed_shape.e1 < -0.5  # e1 < 0: elongated along y
    row.update(position_angle=90.0)
    mom = galsim.hsm.FindAdaptiveMom(make_profile(row).drawImage(nx=96, ny=96, scale=0.02))
    assert mom.observed_shape.e1 > 0.5
    row.update(knot_fraction=0.3, n_knots=8, knot_seed=7)
    p1, p2 = make_profile(row), make_profile(row)
    assert_allclose(p1.flux, 1.0, rtol=1e-12)
    im1 = p1.drawImage(nx=128, ny=128, scale=0.02, method="no_pixel")
    im2 = p2.drawImage(nx=128, ny=128, scale=0.02, method="no_pixel")
    assert_allclose(im1.array, im2.array, rtol=0, atol=0)  # same seed, same knots
    im3 = make_profile(row, 5).drawImage(nx=128, ny=128, scale=0.02, method="no_pixel")
    assert np.abs(im3.array - im1.array).max() > 1e-3 * im1.array.max()  # run seed mixed in
    assert_allclose(im1.array.sum(), 1.0, atol=0.02)  # light beyond the stamp
    star = make_profile({"kind": "star"})
    assert isinstance(star, galsim.DeltaFunction) and star.flux == 1.0


def test_size_relation_shibuya2015():
    """Median star-forming r_e scales as L^0.27 (1+z)^-1.2 (Shibuya et al. 2015 [mem])."""
    r = morphology.half_light_radius_kpc(np.array([2.0, 2.0, 6.0]), np.array([-21.0, -18.5,
                                                                                -21.0]),
                                         np.zeros(3, bool))
    assert_allclose(r[1] / r[0], 10 ** (-0.4 * 2.5 * 0.27), rtol=1e-12)
    assert_allclose(r[2] / r[0], (7 / 3) ** -1.2, rtol=1e-12)
    rng = np.random.default_rng(4)
    m = morphology.draw_morphology(np.full(20000, 2.0), np.full(20000, -21.0),
                                   np.zeros(20000, bool), rng)
    assert_allclose(np.std(np.log(m.r_half_kpc)), 0.6, rtol=0.03)
    assert_allclose(np.median(m.sersic_n), 1.5, rtol=0.03)  # Shibuya et al. 2015 median n
    assert m.sersic_n.min() >= 0.3 and m.sersic_n.max() <= 6.2


# ------------------------------------------------------------------------------------------
# stars
# ------------------------------------------------------------------------------------------
def test_star_counts_slope_and_blackbody_colours():
    """Star counts rise 0.15 dex/mag; colours equal astropy BlackBody through the bands."""
    rng = np.random.default_rng(8)
    mags = stars.draw_star_magnitudes(200000, 16.0, 30.0, 0.15, rng)
    h, e = np.histogram(mags, bins=np.arange(16.0, 30.01, 1.0))
    slope = np.polyfit(0.5 * (e[1:] + e[:-1]), np.log10(h), 1)[0]
    assert_allclose(slope, 0.15, atol=0.01)
    teff = np.array([3200.0, 5800.0])
    got = stars.star_band_magnitudes(np.array([25.0, 22.0]), teff, BANDS, 4)
    for i, t in enumerate(teff):
        bb = BlackBody(temperature=t * u.K)
        fl = []
        for b in BANDS:
            fnu = bb(b.wave * u.nm).value  # per Hz
            fl.append(integrate.trapezoid(fnu * b.throughput / b.wave, b.wave)
                      / integrate.trapezoid(b.throughput / b.wave, b.wave))
        ref = -2.5 * np.log10(np.array(fl) / fl[4]) + [25.0, 22.0][i]
        assert_allclose(got[i], ref, atol=2e-3)


# ------------------------------------------------------------------------------------------
# the truth table
# ------------------------------------------------------------------------------------------
def test_population_table_columns_and_determinism():
    """Table has the documented columns and units; same seed -> identical table."""
    pop = _pop(mag_limit=29.0)
    t1 = make_population(pop, BANDS, (-30, 30), (-20, 25), np.random.default_rng(3))
    t2 = make_population(pop, BANDS, (-30, 30), (-20, 25), np.random.default_rng(3))
    for c in ("id", "kind", "x_arcsec", "y_arcsec", "redshift", "abs_mag_uv", "r_half",
              "sersic_n", "axis_ratio", "position_angle", "beta_uv", "template",
              "knot_fraction", "n_knots", "knot_seed", *(f"mag_{b.name}" for b in BANDS)):
        assert c in t1.colnames
    assert list(t1["id"]) == list(range(1, len(t1) + 1))
    assert t1["x_arcsec"].unit == "arcsec" and t1["position_angle"].unit == "deg"
    assert t1["x_arcsec"].min() >= -30 and t1["y_arcsec"].max() <= 25
    gal = t1["kind"] == "galaxy"
    assert np.all(t1["mag_b36"][gal] < 29.0)
    point = np.isin(t1["kind"], ["star", "dwarf"])  # dusty/quiescent galaxies have redshifts
    assert np.all(t1["redshift"][point] == 0) and np.all(np.isnan(t1["abs_mag_uv"][point]))
    for c in t1.colnames:
        a, b = np.asarray(t1[c]), np.asarray(t2[c])
        assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), c


@pytest.mark.parametrize("band", [0, 4])
def test_preselection_loses_no_visible_galaxies(band):
    """The envelope cut drops nothing: counts match a brute-force draw without it (Poisson)."""
    pop = _pop(mag_limit=27.0, z_min=3.0, z_max=9.0, abs_mag_faint=-17.0,
               star_density_arcmin2=0.0, selection_band=BANDS[band].name)
    area_xy = (-120, 120)
    t = make_population(pop, BANDS, area_xy, area_xy, np.random.default_rng(1))
    # brute force: every galaxy of the luminosity function, SEDs for all, same cut
    rng = np.random.default_rng(2)
    d = luminosity.draw_redshift_magnitude(3.0, 9.0, -17.0, 240.0**2, rng)
    ms = luminosity.uv_lf_parameters(d.redshift).m_star
    p = seds.draw_sed_parameters(d.redshift, d.abs_mag, ms, rng)
    wave = seds.wave_grid(BANDS)
    f = seds.galaxy_fnu(wave, d.redshift, d.abs_mag, p.beta, p.break_strength, p.beta_opt)
    n_ref = np.sum(seds.band_magnitudes(wave, f, [BANDS[band]])[:, 0] < 27.0)
    n = np.sum(t["kind"] == "galaxy")
    assert n_ref > 300 and abs(n - n_ref) < 4 * np.sqrt(n_ref), (n, n_ref)


_B16 = [make_band("b16", 1600, 360, 0.40), make_band("bk", 2150, 320, 0.40),
        make_band("b06", 600, 230, 0.40)]
#: (side arcsec, mag_limit, first bin, last edge, seed): bright bins over 144 arcmin^2 to AB
#: 24, faint ones over 25 arcmin^2 to AB 28 (Poisson errors <= 7 % per half-magnitude bin)
_COUNT_FIELDS = ((720.0, 24.0, 20.0, 24.0, 1), (300.0, 28.0, 24.0, 28.0, 2))


@pytest.fixture(scope="module")
def count_fields():
    """Population-stage tables (galaxies only) of :data:`_COUNT_FIELDS`, selected in a 1.6 um
    band, with a 2.15 um and a 0.6 um band."""
    out = []
    for side, lim, *_, seed in _COUNT_FIELDS:
        pop = _pop(selection_band="b16", mag_limit=lim, star_density_arcmin2=0.0,
                   dwarf_density_arcmin2=0.0, placement="uniform")
        h = side / 2
        out.append(make_population(pop, _B16, (-h, h), (-h, h), np.random.default_rng(seed)))
    return out


def test_number_counts_near_infrared(count_fields):
    """Galaxy counts at 1.6 um against the published counts of Driver et al. 2016, ApJ 827, 108,
    Table 3 (read in a stored copy; units fixed by the background light their paper derives
    from it and checked against Yan et al. 1998: simfield.population.counts, tests/
    test_counts.py), per half-magnitude bin from AB 20 to 28. Achieved with the published
    luminosity functions (no tuning): within 30 % from AB 22 to 26.5 (0.72-0.87); 0.65-0.76 at
    AB 20-22 (as at 2.15 um against Weaver et al. 2022, test_number_counts_k_band; 93 % of
    these galaxies are at z = 0.3-2, from the rest-K function, which meets its authors' binned
    densities: test_rest_k_function_against_cirasuolo_bins); and 0.57-0.68 at AB 26.5-28
    (z = 1-5 star-forming galaxies of the rest-UV functions, checked against Parsa et al. 2016
    above, whose template is too blue from the rest UV to the optical:
    test_template_optical_colours_against_sdss_are_too_blue), where the table is one small deep
    field per data set (cosmic variance 21 % in the table's own column). The slope from AB 20 to 24 is that of the
    table within 0.05 dex/mag (table 0.29, population 0.30; Yan et al. 1998 give 0.31)."""
    from simfield.population.counts import population_counts, reference_counts

    ratios = []
    for t, (side, _, lo, hi, _) in zip(count_fields, _COUNT_FIELDS):
        mid, n, _ = population_counts(t, "b16", side ** 2, np.arange(lo, hi + 0.01, 0.5))
        ratios.append(n / reference_counts(mid))
    r = np.concatenate(ratios)
    mid = np.arange(20.25, 28.0, 0.5)
    ok = (mid > 22.0) & (mid < 26.5)
    assert np.all((r[ok] > 0.7) & (r[ok] < 1.3)), r
    assert np.all((r[~ok] > 0.5) & (r[~ok] < 0.8)), r
    bright = mid[:8]
    slope = np.polyfit(bright, np.log10(ratios[0] * reference_counts(bright)), 1)[0]
    ref_slope = np.polyfit(bright, np.log10(reference_counts(bright)), 1)[0]
    assert abs(slope - ref_slope) < 0.05, (slope, ref_slope)


def test_number_counts_k_band(count_fields):
    """Galaxy counts at 2.15 um against the published Ks counts of Weaver et al. 2022, ApJS
    258, 11, Table 2 (read in a stored copy, simfield.population.counts), per half-magnitude
    bin from AB 20 to 25.5 (AB 20-23 from the field selected to 1.6 um AB 24, where every
    galaxy that bright at 2.15 um is kept but the reddest, 23-25.5 from the deep one).
    Achieved: within 30 % from AB 21.5 to 25.5; 0.66 at AB 20-21.5 (M* galaxies at z ~ 0.3-1
    of the rest-K function, Cirasuolo et al. 2010 [mem]), where two published counts differ by
    ~25 %: the same population is 0.8-0.9 of the K20 count (test_k_band_counts_and_redshifts_of_
    k20), which this table's integral exceeds by 22 % (tests/test_counts.py)."""
    from simfield.population.counts import population_counts, reference_counts_k

    ratios = []
    for t, (side, *_), (lo, hi) in zip(count_fields, _COUNT_FIELDS, ((20.0, 23.0), (23.0, 25.5))):
        mid, n, _ = population_counts(t, "bk", side ** 2, np.arange(lo, hi + 0.01, 0.5))
        ratios.append(n / reference_counts_k(mid))
    r = np.concatenate(ratios)
    mid = np.arange(20.25, 25.5, 0.5)
    assert np.all((r[mid > 21.5] > 0.7) & (r[mid > 21.5] < 1.3)), r
    assert np.all((r[mid < 21.5] > 0.5) & (r[mid < 21.5] < 0.8)), r


#: 0.6 um galaxy counts of Driver et al. 2016, ApJ 827, 108, Table 3, read in ICRAR/shark
#: data/lf/numbercounts/Driver16_numbercounts.data (per 0.5 mag per deg^2, as the 1.6 um rows,
#: simfield.population.counts): the two space-based data sets with bins centred on x.4 and x.9
#: (the table's sets 4 and 5): rows of (bin centre AB, counts, error, set).
_OPTICAL_ROWS = np.array([
    (24.4, 20250.7227, 2551.35132, 4), (24.9, 27643.8457, 2980.9126, 4),
    (25.4, 41465.7656, 3650.85718, 4), (25.9, 60752.1719, 4419.07031, 4),
    (26.4, 78431.375, 5021.0542, 4), (26.9, 102860.82, 5750.09473, 4),
    (27.4, 130826.102, 6484.80908, 4),
    (24.4, 24059.4, 4630.23, 5), (24.9, 38316.8, 5843.26, 5), (25.4, 52574.3, 6844.59, 5),
    (25.9, 86435.6, 8776.21, 5), (26.4, 80198.0, 8453.61, 5), (26.9, 137228.0, 11058.1, 5),
    (27.4, 160396.0, 11955.2, 5)])


def test_optical_counts_match_where_near_infrared_counts_fall_short(count_fields):
    """Where the 1.6 um counts are short (test_number_counts_near_infrared), the same galaxies
    counted at 0.6 um (rest 1500-3000 A at z = 1-3: the rest-UV functions' own light) match the
    published 0.6 um counts of the same compilation (Driver et al. 2016, Table 3, read:
    _OPTICAL_ROWS; per bin the two sets averaged with inverse-variance weights and doubled to
    per mag, as the 1.6 um reference) within 30 % in every half-magnitude bin from AB 24.15 to
    27.65 (achieved 0.97-1.22; the field is selected at 1.6 um < 28, which keeps 99.4 % of the
    galaxies of AB 27.15-27.65 at 0.6 um: measured in a field selected at 0.6 um). So the
    number of galaxies is that of the published rest-UV functions, and the 1.6 um shortfall at
    AB 26.4-27.4 is in the near-infrared-to-optical ratio: the population's 1.6 um / 0.6 um
    count ratio is 0.52-0.60 of the published one there (bounded below 0.8), i.e. the
    templates' rest-optical light relative to their UV (or a population red in 0.6 - 1.6 um),
    not the luminosity functions."""
    from simfield.population.counts import binned_counts, population_counts, reference_counts

    t = count_fields[1]
    side = _COUNT_FIELDS[1][0]
    edges = np.arange(24.15, 27.66, 0.5)
    mid, n06, _ = population_counts(t, "b06", side ** 2, edges)
    mags, logn = binned_counts(_OPTICAL_ROWS)
    np.testing.assert_allclose(mid, mags, atol=1e-9)
    r06 = n06 / 10.0 ** logn
    assert np.all((r06 > 0.7) & (r06 < 1.3)), r06
    _, n16, _ = population_counts(t, "b16", side ** 2, edges)
    r16 = n16 / reference_counts(mid)
    faint = mid > 26.0
    assert np.all(r16[faint] / r06[faint] < 0.8), r16 / r06


#: Rest-UV Schechter fits with the steep faint-end slope of colour-selected samples (Reddy &
#: Steidel 2009, ApJ 692, 778: z ~ 2.3 M* = -20.70, phi* = 2.75e-3 Mpc^-3, alpha = -1.73;
#: z ~ 3.05 M* = -20.97, phi* = 1.71e-3, alpha = -1.73 [from memory]) in place of the Parsa et al.
#: 2016 nodes at z = 2.0 and 2.8 (luminosity.LOW_Z_NODES), the z = 3.8 node kept.
_STEEP_NODES = ((0.055, -18.04, 4.07e-3, -1.22), (1.0, -19.60, 3.0e-3, -1.50),
                (2.3, -20.70, 2.75e-3, -1.73), (3.05, -20.97, 1.71e-3, -1.73),
                (3.8, -20.71, 2.3e-3, -1.43))


def test_steep_faint_end_slopes_overshoot_the_optical_counts(monkeypatch):
    """Why the light cone keeps Parsa et al.'s shallow slopes at z = 2-3.8 although its 1.6 um
    counts fall short at AB 26.5-28 (test_number_counts_near_infrared): with the steeper
    published slopes (_STEEP_NODES) the 1.6 um counts of the faint field would meet Driver et
    al. 2016 (0.85-0.96 at AB 26.25-27.75, measured 2026-12-04), but the same galaxies'
    0.6 um counts overshoot the same compilation's (_OPTICAL_ROWS) by more than 30% at AB
    26.4-27.4 (1.42-1.56), where the shallow slopes give 1.11-1.22. The rest-UV functions are
    pinned by the optical counts; the near-infrared shortfall is in the templates' colours."""
    from simfield.population.counts import binned_counts, population_counts

    monkeypatch.setattr(luminosity, "LOW_Z_NODES", _STEEP_NODES)
    side, lim, *_, seed = _COUNT_FIELDS[1]
    pop = _pop(selection_band="b16", mag_limit=lim, star_density_arcmin2=0.0,
               dwarf_density_arcmin2=0.0, placement="uniform")
    t = make_population(pop, _B16, (-side / 2, side / 2), (-side / 2, side / 2),
                        np.random.default_rng(seed))
    mid, n06, _ = population_counts(t, "b06", side ** 2, np.arange(26.15, 27.66, 0.5))
    mags, logn = binned_counts(_OPTICAL_ROWS)
    r06 = n06 / 10.0 ** np.interp(mid, mags, logn)
    assert np.all(r06 > 1.3), r06


def _cirasuolo2010(z):
    """Cirasuolo et al. 2010, MNRAS 401, 1166 rest-K evolution fit [mem] (typed here)."""
    return -22.26 - (z / 1.78) ** 0.47, 3.5e-3 * np.exp(-((z / 1.70) ** 1.47)), -1.07


def test_rest_k_function_local_and_evolution():
    """Rest-K parameters: the Cirasuolo et al. 2010 fit; at z = 0 within 0.1 mag and 15 % of
    the local K-band function of Kochanek et al. 2001, ApJ 560, 566 [mem]: M* - 5 log h =
    -23.39 (Vega), phi* = 1.16e-2 h^3 Mpc^-3, alpha = -1.09, i.e. -22.31 AB (K_AB - K_Vega =
    1.85, Blanton & Roweis 2007 [mem]) and 3.98e-3 Mpc^-3 for h = 0.7."""
    for z in (0.0, 0.5, 1.5, 3.0):
        p = luminosity.nir_lf_parameters(z)
        assert_allclose([p.m_star, p.phi_star, p.alpha], _cirasuolo2010(z), rtol=1e-12)
    p0 = luminosity.nir_lf_parameters(0.0)
    assert abs(p0.m_star - (-23.39 + 5 * np.log10(0.7) + 1.85)) < 0.1
    assert_allclose(p0.phi_star, 1.16e-2 * 0.7 ** 3, rtol=0.15)
    # Cole et al. 2001, MNRAS 326, 255 [from memory]: M* - 5 log h = -23.44 (Vega),
    # phi* = 1.08e-2 h^3 Mpc^-3, alpha = -0.96: -22.37 AB and 3.70e-3 Mpc^-3 for h = 0.7
    assert abs(p0.m_star - (-23.44 + 5 * np.log10(0.7) + 1.85)) < 0.15
    assert_allclose(p0.phi_star, 1.08e-2 * 0.7 ** 3, rtol=0.15)


#: Rest-K function of Cirasuolo et al. 2010, MNRAS 401, 1166: their 1/Vmax densities (Fig. 8),
#: read in ICRAR/shark data/lf/lfKz_cirasuolo10.data (Vega; AB = Vega + 1.9 there; H0 = 70,
#: Omega_m = 0.3, flat): {z: (brighter edge of the first 0.5-mag bin, [(log10 phi / Mpc^-3
#: mag^-1, error up, error down), ...] in bins of 0.5 mag going brighter)}.
_CIRASUOLO_BINS = {
    0.5: (-20.0, [(-2.2426, 0.0191, 0.0157), (-2.3398, 0.0182, 0.0127),
                  (-2.4383, 0.0233, 0.0107), (-2.5065, 0.0122, 0.0104),
                  (-2.5729, 0.0114, 0.0112), (-2.6406, 0.0256, 0.0123),
                  (-2.6913, 0.0148, 0.0129), (-2.7187, 0.0241, 0.0134),
                  (-2.7966, 0.0252, 0.0147), (-2.9616, 0.0243, 0.0178),
                  (-3.2043, 0.0719, 0.0251), (-3.7276, 0.1663, 0.0553)]),
    1.0: (-21.5, [(-2.5340, 0.0767, 0.0175), (-2.5987, 0.0119, 0.0104),
                  (-2.6965, 0.0125, 0.0089), (-2.7824, 0.0151, 0.0096),
                  (-2.8636, 0.0230, 0.0106), (-2.9208, 0.0121, 0.0112),
                  (-3.0345, 0.0170, 0.0128), (-3.2677, 0.0251, 0.0169),
                  (-3.6412, 0.0638, 0.0274)]),
    1.5: (-22.5, [(-2.8555, 0.0741, 0.0205), (-2.8454, 0.0282, 0.0111),
                  (-2.9030, 0.0168, 0.0098), (-2.9990, 0.0116, 0.0106),
                  (-3.0823, 0.0256, 0.0118), (-3.2510, 0.0211, 0.0143),
                  (-3.5002, 0.0593, 0.0201)]),
    2.0: (-23.5, [(-3.1328, 0.0623, 0.0185), (-3.1725, 0.0380, 0.0143),
                  (-3.3377, 0.0243, 0.0154), (-3.5054, 0.0217, 0.0182),
                  (-3.7682, 0.0286, 0.0249), (-4.1543, 0.0774, 0.0416)]),
}


def test_rest_k_function_against_cirasuolo_bins():
    """The typed evolution fit (luminosity.nir_lf_parameters, [mem]) against the binned 1/Vmax
    densities it was fitted to (Cirasuolo et al. 2010, Fig. 8, read: _CIRASUOLO_BINS) at z =
    0.5, 1, 1.5 and 2, in every bin measured to 0.03 dex brighter than M_AB = -19.3: each
    within 0.15 dex, rms 0.06 dex (achieved: largest 0.11 dex, at z = 1.5, M_AB = -23.35;
    rms 0.046), so no parameter was mistyped. Fainter at z = 0.5 their points lie 0.12-0.20
    dex above the fit (alpha = -1.07: their points are steeper there); such galaxies are
    fainter than AB 23 at 1.6 um, so they do not make the bright counts."""
    diffs, faint = [], []
    for z, (first, rows) in _CIRASUOLO_BINS.items():
        p = luminosity.nir_lf_parameters(z)
        for i, (logphi, up, dn) in enumerate(rows):
            m_ab = first - 0.25 - 0.5 * i + 1.9
            model = np.log10(luminosity.schechter_phi(m_ab, p.m_star, p.phi_star, p.alpha))
            if m_ab > -19.3:
                faint.append(model - logphi)
            elif max(up, dn) < 0.03:
                diffs.append(model - logphi)
    diffs = np.array(diffs)
    assert diffs.size >= 20
    assert np.all(np.abs(diffs) < 0.15), diffs
    assert np.sqrt(np.mean(diffs ** 2)) < 0.06, diffs
    assert np.all((np.array(faint) > -0.25) & (np.array(faint) < -0.1)), faint


#: Local rest-K function of Driver et al. 2012, MNRAS 427, 3244 (1/Vmax, z < 0.1), read in
#: ICRAR/shark data/lf/lfk_z0_driver12.data: bin centre M_AB - 5 log h, density (h^3 Mpc^-3 per
#: 0.5 mag) and its error.
_DRIVER2012_K = np.array([
    (-22.75, 0.000286053575, 3.28125934e-05), (-22.25, 0.00084686873, 5.64579132e-05),
    (-21.75, 0.00187439716, 8.3993742e-05),
    (-21.25, 0.0028680684, 0.000103899161), (-20.75, 0.00361153041, 0.0001175453),
    (-20.25, 0.00371022988, 0.000118277807), (-19.75, 0.00411500549, 0.000124811791),
    (-19.25, 0.00443232432, 0.000132087676), (-18.75, 0.005041203, 0.000181319469)])


def test_local_rest_k_function_against_driver2012_bins():
    """The rest-K function at z = 0 (the Cirasuolo et al. 2010 fit, [mem], checked against its
    own bins above) against the local binned densities of Driver et al. 2012 (read:
    _DRIVER2012_K, bins measured to 11 %; h = 0.7: M_AB = M - 5 log h - 0.775, densities
    x 0.343 x 2 per mag): within 20 % from M_AB = -21.8 to -19.3 (achieved 0.82-1.08), but
    0.6-0.75 of them from -23.8 to -21.8 (errors 4-11 %): the fit's local M* (-22.26 AB) is
    ~0.2 mag fainter than these bins, as it is than Kochanek et al. 2001 and Cole et al. 2001
    [mem] by 0.05-0.1 mag (test above). Not changed (the functions stay as published): the
    1.6 um counts at AB 20-22 come from z = 0.3-2 (93 % of them; 4 % from z < 0.3), where the
    fit meets its own bins."""
    p = luminosity.nir_lf_parameters(0.0)
    m = _DRIVER2012_K[:, 0] + 5 * np.log10(0.7)
    data = _DRIVER2012_K[:, 1] * 0.7 ** 3 * 2.0
    r = luminosity.schechter_phi(m, p.m_star, p.phi_star, p.alpha) / data
    mid = m > -21.8
    assert mid.sum() == 5 and np.all(np.abs(r[mid] - 1.0) < 0.2), r
    assert np.all((r[~mid] > 0.5) & (r[~mid] < 0.8)), r


def test_template_near_infrared_colours():
    """The template's rest-frame AB colours J - K (1.2 - 2.2 um) and K - 3.6 um equal those of
    galaxies: (J - K)_Vega ~ 0.9 (local galaxies, Jarrett et al. 2003, AJ 125, 525 [from
    memory]) and (K - [3.6 um])_Vega ~ 0.2 [from memory], converted to AB with Vega's flux
    densities 1594 Jy (J), 666.7 Jy (K) (Cohen et al. 2003, AJ 126, 1090 [from memory]) and
    280.9 Jy (3.6 um) [from memory]: AB - Vega = 2.5 log10(3631 Jy / F_Vega)."""
    ab = {k: 2.5 * np.log10(3631.0 / f) for k, f in (("J", 1594.0), ("K", 666.7),
                                                     ("L", 280.9))}
    j_k = 0.9 + ab["J"] - ab["K"]
    k_l = 0.2 + ab["K"] - ab["L"]
    for beta, br, bo in ((-2.0, 1.25, -1.2), (1.0, 1.9, -0.7)):  # star-forming, evolved
        f = seds.rest_fnu_shape(np.array([1200.0, 2200.0, 3550.0]), beta, br, bo)
        m = -2.5 * np.log10(f)
        assert abs((m[0] - m[1]) - j_k) < 0.03
        assert abs((m[1] - m[2]) - k_l) < 0.03
        # a single power law over 1.2-3.6 um would put K 0.3-0.5 mag too faint
        assert m[1] - m[0] < 0.1


#: Rest-frame u - r and g - r distributions of SDSS galaxies (NYU-VAGC, Blanton et al. 2005, AJ
#: 129, 2562; Petrosian magnitudes, AB, 1/Vmax-weighted, M_r - 5 log h bins), read in
#: ICRAR/shark data/Colours/ur_colours_SDSS.data and gr_colours_SDSS.data: {M_r - 5 log h:
#: (first bin centre, bin width, densities)}.
_SDSS_UR = {
    -17.5: (-0.045, 0.09, [0.00243, 0, 0, 0.00192, 0.00789, 0.0118, 0.0245, 0.0435, 0.0887,
                           0.185, 0.329, 0.547, 0.802, 1.019, 1.297, 1.097, 0.947, 0.865,
                           0.680, 0.512, 0.492, 0.401, 0.382, 0.356, 0.304, 0.209, 0.151,
                           0.100, 0.0642, 0.0599, 0.0246, 0.0115, 0.0237, 0.0122, 0.00758,
                           0.00254, 0.00284, 0.00803, 0.00410]),
    -21.25: (1.035, 0.09, [0.00995, 0.0199, 0.0199, 0.0199, 0.0398, 0.0895, 0.129, 0.119,
                           0.229, 0.408, 0.458, 0.686, 0.547, 0.736, 0.975, 1.452, 1.999,
                           1.482, 0.736, 0.408, 0.239, 0.139, 0.0298, 0.0199, 0, 0.0298, 0,
                           0, 0, 0.0199, 0, 0.00995, 0, 0, 0.00994]),
}
_SDSS_GR = {
    -17.5: (-0.025, 0.05, [0.015, 0.013, 0.023, 0.078, 0.260, 0.542, 1.147, 2.283, 2.924,
                           3.137, 2.560, 1.784, 1.382, 0.958, 1.289, 1.083, 0.325, 0.118,
                           0.017, 0.0, 0.004, 0.007]),
    -21.25: (-0.025, 0.05, [0, 0, 0, 0, 0, 0, 0, 0.018, 0.036, 0.089, 0.197, 0.626, 1.252,
                            1.807, 2.325, 2.916, 6.279, 3.882, 0.447, 0.107, 0.0, 0.018]),
}


def _median_of_bins(first, width, dens):
    c = np.cumsum(dens) / np.sum(dens)
    return float(np.interp(0.5, c, first + width * np.arange(len(dens))))


def _rest_colour(sed, a, b):
    """Rest-frame AB colour between ``a`` and ``b`` (nm) of the first template of ``sed``."""
    return float(-2.5 * np.log10(
        seds.rest_fnu_shape(a, sed.beta, sed.break_strength, sed.beta_opt)
        / seds.rest_fnu_shape(b, sed.beta, sed.break_strength, sed.beta_opt))[0])


def _mean_template(evolved, m_r):
    """The mean template (zero deviates) at z = 0.1 with rest 616 nm magnitude ``m_r``:
    M_UV from M_r = M_UV - 2.5 log10 f(616 nm)/f(150 nm), iterated."""
    m = m_r
    for _ in range(20):
        s = seds.sed_parameters_from_deviates(np.array([0.1]), np.array([m]),
                                              np.array([evolved]), np.zeros((3, 1)))
        m = m_r + 2.5 * np.log10(float(seds.rest_fnu_shape(
            616.0, s.beta, s.break_strength, s.beta_opt)[0]))
    return s


def test_template_optical_colours_against_sdss_are_too_blue():
    """A known shortfall, kept measured: the templates' rest-frame optical colours against the
    SDSS distributions (_SDSS_UR, _SDSS_GR, read). The mean star-forming template at z = 0.1
    with M_r = -18.3 (the faint bin, -17.5 + 5 log 0.7, h = 0.7; 84 % of its galaxies have
    u - r > 1) and the evolved template against the bright bin (M_r - 5 log h = -21.25,
    nearly all red): colours at the bands' pivots 356, 470 and 616 nm, rest frame.

    Measured: star-forming u - r 0.70 against the faint bin's median 1.31, g - r 0.26 against
    0.42; evolved u - r 1.55 against 2.36, g - r 0.38 against 0.73. The templates are one
    power law from 380 to 1200 nm and a step at 380 nm (simfield.population.seds): too little
    break and too flat an optical slope for galaxies at z ~ 0.1. Galaxies normalised in the
    rest UV (the rest-UV functions, z >= 1) are then too faint in the rest optical, which is
    the near-infrared shortfall at AB 26.5-28 (test_number_counts_near_infrared; their
    0.6 um counts meet the published ones:
    test_optical_counts_match_where_near_infrared_counts_fall_short). The bounds fail if the
    templates change, so this record is kept true."""
    h = 5 * np.log10(0.7)
    sf, ev = _mean_template(False, -17.5 + h), _mean_template(True, -21.25 + h)
    colour = _rest_colour
    gap = {
        "sf u-r": _median_of_bins(*_SDSS_UR[-17.5]) - colour(sf, 356.0, 616.0),
        "sf g-r": _median_of_bins(*_SDSS_GR[-17.5]) - colour(sf, 470.0, 616.0),
        "ev u-r": _median_of_bins(*_SDSS_UR[-21.25]) - colour(ev, 356.0, 616.0),
        "ev g-r": _median_of_bins(*_SDSS_GR[-21.25]) - colour(ev, 470.0, 616.0),
    }
    assert 0.45 < gap["sf u-r"] < 0.8 and 0.05 < gap["sf g-r"] < 0.3, gap
    assert 0.6 < gap["ev u-r"] < 1.0 and 0.25 < gap["ev g-r"] < 0.55, gap


def _blue_peak(first, width, dens, p0):
    """Centre of the bluer of two Gaussians fitted (least squares) to a binned colour
    distribution: the blue cloud (galaxy colours are bimodal, two Gaussians per luminosity bin:
    Baldry et al. 2004, ApJ 600, 681 [mem]). ``p0``: (amplitude, centre, sigma) of each."""
    from scipy.optimize import curve_fit

    def two(x, a1, m1, s1, a2, m2, s2):
        return a1 * np.exp(-0.5 * ((x - m1) / s1) ** 2) + a2 * np.exp(-0.5 * ((x - m2) / s2) ** 2)

    x = first + width * np.arange(len(dens))
    p, _ = curve_fit(two, x, np.asarray(dens, float), p0=p0, maxfev=20000)
    return float(min(p[1], p[4]))


def test_sdss_anchored_star_forming_template_breaks_the_k_counts(monkeypatch):
    """Why the star-forming template keeps its blue rest-optical shape (seds.SF_OPT_OFFSET =
    0.8, seds.SF_BREAK = 1.25) although it lies below the SDSS colours (test above).

    Anchored instead to the blue cloud of the faint SDSS bin (the blue Gaussian of _SDSS_UR and
    _SDSS_GR at M_r - 5 log h = -17.5: u - r 1.22, g - r 0.415; the offset and break that put
    the mean template there, solved here: 1.415 and 1.59), star-forming galaxies are ~0.5 mag
    brighter at 1.6 um for their UV light. Measured (2026-12-04, the fields of
    test_number_counts_near_infrared): the 1.6 um counts of Driver et al. 2016 are then met
    within 30 % in 15 of 16 bins (10 now; AB 20-21 at 0.71-0.72, AB 26-28 rises from
    0.57-0.73 to 0.65-0.83, AB 27.5-28 stays short at 0.65), and the 0.6 um counts of the
    same compilation stay within 30 % (0.85-1.29); but the same galaxies' 2.15 um counts
    exceed those of Weaver et al. 2022 by 29-48 % at AB 23-25.5 (test_number_counts_k_band:
    within 30 % now), and in the full suite K20's median redshift moved to 0.93 (published
    0.80, test_k_band_counts_and_redshifts_of_k20). The published 1.6 um and 2.15 um counts
    cannot both be met through the template's rest-optical shape: which to follow is not a
    choice the project can make from the published numbers alone."""
    from scipy.optimize import fsolve

    from simfield.population.counts import population_counts, reference_counts, \
        reference_counts_k

    ur = _blue_peak(*_SDSS_UR[-17.5], p0=(1.2, 1.2, 0.2, 0.3, 2.0, 0.3))
    gr = _blue_peak(*_SDSS_GR[-17.5], p0=(3.0, 0.42, 0.1, 1.0, 0.7, 0.08))
    m_r = -17.5 + 5 * np.log10(0.7)

    def miss(p):
        monkeypatch.setattr(seds, "SF_OPT_OFFSET", p[0])
        monkeypatch.setattr(seds, "SF_BREAK", p[1])
        sf = _mean_template(False, m_r)
        return [_rest_colour(sf, 356.0, 616.0) - ur, _rest_colour(sf, 470.0, 616.0) - gr]

    offset, brk = fsolve(miss, [1.2, 1.5])
    assert np.allclose(miss([offset, brk]), 0.0, atol=1e-6)
    print("blue cloud u-r %.3f g-r %.3f: offset %.3f break %.3f" % (ur, gr, offset, brk))
    r16, rk = [], None
    for side, lim, lo, hi, seed in _COUNT_FIELDS:
        pop = _pop(selection_band="b16", mag_limit=lim, star_density_arcmin2=0.0,
                   dwarf_density_arcmin2=0.0, placement="uniform")
        t = make_population(pop, _B16, (-side / 2, side / 2), (-side / 2, side / 2),
                            np.random.default_rng(seed))
        mid, n, _ = population_counts(t, "b16", side ** 2, np.arange(lo, hi + 0.01, 0.5))
        r16.append(n / reference_counts(mid))
        if lim > 24.0:
            mk, nk, _ = population_counts(t, "bk", side ** 2, np.arange(23.0, 25.51, 0.5))
            rk = nk / reference_counts_k(mk)
    r16 = np.concatenate(r16)
    print("1.6 um", np.round(r16, 2), "2.15 um", np.round(rk, 2))
    ok = (r16 > 0.7) & (r16 < 1.3)
    assert ok.sum() >= 12 and ok[-1] == False, r16  # noqa: E712
    assert np.sum(rk > 1.3) >= 2, rk


def test_k_band_counts_and_redshifts_of_k20():
    """Near-infrared counts at the bright end against a published count: 480 galaxies with
    Ks < 20 (Vega) over 52 arcmin^2, median redshift 0.80 (Cimatti et al. 2002, A&A 391, L1,
    abstract: ~32 % at z > 1, ~9 % at z > 1.5); Ks_AB = Ks_Vega + 1.84 (the 666.7 Jy above).
    Count within 20 % (Poisson 5 %, and cosmic variance of two 26 arcmin^2 fields ~10-15 %,
    common practice); median within 0.1, fractions within 0.08 and 0.06 (~3 sigma of 480
    galaxies). Before the quiescent galaxies at z = 2-4 came from the rest-K function, evolved
    templates on rest-UV galaxies put 15 % of these galaxies at z > 2 and 20 % at z > 1.5."""
    bands = [make_band("bk", 2150, 320, 0.40)]
    pop = _pop(selection_band="bk", mag_limit=22.0, star_density_arcmin2=0.0,
               dwarf_density_arcmin2=0.0, placement="uniform")
    h = np.sqrt(52.0 * 3600.0) / 2
    t = make_population(pop, bands, (-h, h), (-h, h), np.random.default_rng(7))
    sel = np.asarray(t["mag_bk"]) < 20.0 + 2.5 * np.log10(3631.0 / 666.7)
    assert abs(sel.sum() / 480.0 - 1.0) < 0.2, sel.sum()
    z = np.asarray(t["redshift"])[sel]
    assert abs(np.median(z) - 0.80) < 0.1
    assert abs(np.mean(z > 1.0) - 0.32) < 0.08
    assert abs(np.mean(z > 1.5) - 0.09) < 0.06


def test_bright_light_cone_follows_rest_k_function(count_fields):
    """Below z = 2 the bright galaxies are those of the rest-K function: the number with
    M_K < -22 at 0.5 < z < 1 (M_K from each galaxy's rest-1.2 um template magnitude and
    (J - K)_AB = -0.04) matches int dz dV/dz dOmega int phi_K dM (Cirasuolo et al. 2010 typed
    here, astropy volumes) within 4 Poisson sigma."""
    t = count_fields[0]
    side = _COUNT_FIELDS[0][0]
    g = (np.asarray(t["kind"]).astype(str) == "galaxy") & (t["redshift"] > 0.5) \
        & (t["redshift"] < 1.0)
    shape = seds.rest_fnu_shape(1200.0, t["beta_uv"][g], t["break_strength"][g],
                                t["beta_opt"][g])
    m_k = np.asarray(t["abs_mag_uv"][g]) - 2.5 * np.log10(shape) + 0.04
    n = int(np.sum(m_k < -22.0))
    cd = sf_cosmo.default_cosmology()
    sr = side ** 2 / sf_cosmo.ARCSEC2_PER_SR

    def dndz(z):
        ms, ps, al = _cirasuolo2010(z)
        dens = integrate.quad(_schechter, ms - 10, -22.0, args=(ms, ps, al))[0]
        return dens * cd.differential_comoving_volume(z).value * sr

    ref = integrate.quad(dndz, 0.5, 1.0)[0]
    assert ref > 100 and abs(n - ref) < 4 * np.sqrt(ref), (n, ref)


def test_uniform_mode_magnitudes_and_k_correction():
    """Uniform mode: m uniform; M_UV matches a power-law K-correction (Hogg 1999 eq. 13)."""
    # at z > 11.5 the band sees rest 150-330 nm, where the template is a pure power law
    pop = _pop(mode="uniform", uniform_mag_min=25.0, uniform_mag_max=29.0,
               uniform_density_arcmin2=300.0, z_min=11.5, z_max=14.5, star_density_arcmin2=0.0)
    t = make_population(pop, BANDS, (-60, 60), (-60, 60), np.random.default_rng(9))
    n_exp = 300.0 * 4.0
    assert abs(len(t) - n_exp) < 5 * np.sqrt(n_exp)
    m = np.asarray(t["mag_b36"])
    assert stats.kstest(m, stats.uniform(25.0, 4.0).cdf).pvalue > 0.01
    b = BANDS[4]
    cd = sf_cosmo.default_cosmology()
    for row in t[:20]:
        z, beta = row["redshift"], row["beta_uv"]
        avg = integrate.trapezoid(b.wave ** (beta + 2) * b.throughput / b.wave, b.wave) \
            / integrate.trapezoid(b.throughput / b.wave, b.wave)
        k = -2.5 * np.log10(avg / (150.0 * (1 + z)) ** (beta + 2))
        ref = row["abs_mag_uv"] + cd.distmod(z).value - 2.5 * np.log10(1 + z) + k
        assert_allclose(row["mag_b36"], ref, atol=3e-3)


def test_bad_inputs_raise_config_error():
    """Bad selection band, field range, too many sources, invisible uniform z raise ConfigError."""
    rng = np.random.default_rng(0)
    with pytest.raises(ConfigError, match="population.selection_band"):
        make_population(_pop(selection_band="b99"), BANDS, (-5, 5), (-5, 5), rng)
    with pytest.raises(ConfigError, match="field_xi_arcsec"):
        make_population(_pop(), BANDS, (5, -5), (-5, 5), rng)
    with pytest.raises(ConfigError, match="population.max_sources"):
        make_population(_pop(max_sources=10), BANDS, (-30, 30), (-30, 30), rng)
    with pytest.raises(ConfigError, match="population.z_max"):
        make_population(_pop(mode="uniform", selection_band="b10", z_max=12.0), BANDS,
                        (-5, 5), (-5, 5), rng)
