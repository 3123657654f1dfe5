"""Lensing stage: profiles, image finding, critical curves, lensed rendering, cluster members.

Comparison to other sources
---------------------------
- SIS and point-mass lenses: Schneider, Ehlers & Falco 1992, "Gravitational Lenses" (SEF),
  chapter 8 [mem for the chapter]; total point-mass magnification: Paczynski 1986, ApJ 304, 1.
- NFW convergence and shear: Wright & Brainerd 2000, ApJ 534, 34, eqs. 11-16 (written out
  below, independently of simfield's implementation), and galsim.NFWHalo (reference library).
- Distances and constants: astropy.cosmology and astropy.constants (reference library).
- Faber & Jackson 1976, ApJ 204, 668: L ~ sigma^4.
Tolerances say why they are what they are.
"""

import warnings

import galsim
import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from astropy.cosmology import FlatLambdaCDM
from astropy.table import Table
from numpy.testing import assert_allclose

from simfield.bands import make_band
from simfield.config import LensComponentConfig, LensConfig, Scenario, validate
from simfield.errors import ConfigError
from simfield.grid import Grid
from simfield.lensing import (build_lens, critical_curves, find_images, lens_sources,
                              render_lensed, write_lens_png)
from simfield.population.members import make_members

COSMO = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=0.0)  # matches galsim.NFWHalo's cosmology
ARCSEC = 180.0 / np.pi * 3600.0
Z_L, Z_S = 0.3, 1.5


def _distances(z_l=Z_L, z_s=Z_S):
    d_l = COSMO.angular_diameter_distance(z_l)
    d_s = COSMO.angular_diameter_distance(z_s)
    d_ls = COSMO.angular_diameter_distance(z_l, z_s)
    return d_l, d_s, d_ls


def _lens(*components, z_l=Z_L, ref=9.0):
    cfg = LensConfig(kind="cluster", redshift=z_l, reference_redshift=ref,
                     components=list(components))
    return build_lens(cfg, cosmo=COSMO)


def _sis_theta_e(sigma_kms):
    """SEF 1992: theta_E = 4 pi (sigma/c)^2 D_ls/D_s (arcsec)."""
    _, d_s, d_ls = _distances()
    return float(4 * np.pi * (sigma_kms * u.km / u.s / const.c).decompose() ** 2
                 * (d_ls / d_s).decompose()) * ARCSEC


def _paint(stamps, grid):
    img = np.zeros(grid.shape)
    for st, iy0, ix0 in stamps:
        ny, nx = st.shape
        y0, x0 = max(iy0, 0), max(ix0, 0)
        y1, x1 = min(iy0 + ny, grid.ny), min(ix0 + nx, grid.nx)
        img[y0:y1, x0:x1] += st[y0 - iy0:y1 - iy0, x0 - ix0:x1 - ix0]
    return img


# ---------------------------------------------------------------- Wright & Brainerd 2000
def _wb_nfw(x_arcsec, m200, conc, z_l=Z_L, z_s=Z_S):
    """kappa, |gamma| and deflection (arcsec) of an NFW halo, WB 2000 eqs. 11-16."""
    rho_c = COSMO.critical_density(z_l).to(u.Msun / u.Mpc**3).value
    r200 = (3 * m200 / (800 * np.pi * rho_c)) ** (1 / 3)
    r_s = r200 / conc
    delta_c = 200 / 3 * conc**3 / (np.log(1 + conc) - conc / (1 + conc))  # WB 2000
    d_l, d_s, d_ls = _distances(z_l, z_s)
    sig_cr = (const.c**2 / (4 * np.pi * const.G) * d_s / (d_l * d_ls)).to(u.Msun / u.Mpc**2).value
    x = np.asarray(x_arcsec, float) / ARCSEC * d_l.to(u.Mpc).value / r_s
    ks = delta_c * rho_c * r_s / sig_cr
    lo = x < 1
    xl, xh = x[lo], x[~lo]
    t_lo = np.arctanh(np.sqrt((1 - xl) / (1 + xl)))
    t_hi = np.arctan(np.sqrt((xh - 1) / (1 + xh)))
    kap = np.empty_like(x)
    g = np.empty_like(x)
    kap[lo] = 2 * ks / (xl**2 - 1) * (1 - 2 / np.sqrt(1 - xl**2) * t_lo)  # WB eq. 11
    kap[~lo] = 2 * ks / (xh**2 - 1) * (1 - 2 / np.sqrt(xh**2 - 1) * t_hi)
    g[lo] = np.log(xl / 2) + 2 / np.sqrt(1 - xl**2) * t_lo  # WB eqs. 13-15
    g[~lo] = np.log(xh / 2) + 2 / np.sqrt(xh**2 - 1) * t_hi
    kbar = 4 * ks * g / x**2
    return kap, kbar - kap, kbar * np.asarray(x_arcsec, float)


# ---------------------------------------------------------------- profiles
def test_sis_einstein_radius_from_velocity_dispersion():
    """SIS deflection = theta_E and kappa(theta_E) = 1/2 (SEF 1992), astropy distances."""
    lens = _lens(LensComponentConfig(kind="sis", sigma_kms=250.0))
    te = _sis_theta_e(250.0)
    x = np.array([0.3, 1.0, 4.0]) * te
    ax, ay = lens.deflection(x, 0 * x, Z_S)
    assert_allclose(ax, te, rtol=1e-5)  # table of D_ls/D_s: error < 2e-6 in the ratio
    assert_allclose(ay, 0.0, atol=1e-12)
    assert_allclose(lens.convergence(te, 0.0, Z_S), 0.5, rtol=1e-5)
    assert_allclose(lens.distance_ratio(Z_S),
                    (_distances()[2] / _distances()[1]).decompose().value, rtol=1e-5)
    assert lens.distance_ratio(0.2) == 0.0  # foreground source: not lensed


def test_point_mass_einstein_radius_and_magnification():
    """Point mass theta_E (SEF 1992); total mu = (u^2+2)/(u sqrt(u^2+4)) (Paczynski 1986)."""
    m = 1e12
    lens = _lens(LensComponentConfig(kind="point", mass_msun=m))
    d_l, d_s, d_ls = _distances()
    te = float(np.sqrt((4 * const.G * m * u.Msun / const.c**2 * d_ls / (d_l * d_s))
                       .decompose())) * ARCSEC
    ax, _ = lens.deflection(te, 0.0, Z_S)
    assert_allclose(ax, te, rtol=1e-5)
    uu = np.array([0.1, 0.4, 1.0, 2.5])
    ang = np.deg2rad([10.0, 100.0, 200.0, 290.0])
    tab = find_images(lens, uu * te * np.cos(ang), uu * te * np.sin(ang), Z_S, 8 * te, te / 50)
    total = np.bincount(tab["source"], weights=np.abs(tab["mu"]), minlength=4)
    assert_allclose(np.bincount(tab["source"], minlength=4), 2)
    assert_allclose(total, (uu**2 + 2) / (uu * np.sqrt(uu**2 + 4)), rtol=1e-6)


def test_nfw_matches_wright_brainerd():
    """NFW kappa, |gamma| and deflection against WB 2000 eqs. 11-16 written in this test."""
    m200, conc = 8e14, 5.0
    lens = _lens(LensComponentConfig(kind="nfw", mass_msun=m200, concentration=conc))
    r = np.array([0.2, 3.0, 20.0, 60.0, 150.0, 400.0])
    phi = np.deg2rad(37.0)
    x, y = r * np.cos(phi), r * np.sin(phi)
    kap_ref, gam_ref, alp_ref = _wb_nfw(r, m200, conc)
    # 1e-6: D_ls/D_s is interpolated from a table (error < 2e-6 absolute); formulas are exact
    assert_allclose(lens.convergence(x, y, Z_S), kap_ref, rtol=1e-6)
    g1, g2 = lens.shear(x, y, Z_S)
    assert_allclose(np.hypot(g1, g2), gam_ref, rtol=1e-6)
    # tangential: gamma1 + i gamma2 = -|gamma| exp(2 i phi) (SEF 1992 sign convention)
    assert_allclose(g1, -gam_ref * np.cos(2 * phi), rtol=1e-6, atol=1e-12)
    ax, ay = lens.deflection(x, y, Z_S)
    assert_allclose(np.hypot(ax, ay), alp_ref, rtol=1e-6)


def test_nfw_matches_galsim():
    """NFW kappa and shear against galsim.NFWHalo (M200c in Msun/h, same flat LCDM)."""
    m200, conc, h = 8e14, 5.0, 0.7
    lens = _lens(LensComponentConfig(kind="nfw", mass_msun=m200, concentration=conc,
                                     x_arcsec=2.0, y_arcsec=-1.0))
    halo = galsim.NFWHalo(mass=m200 * h, conc=conc, redshift=Z_L, omega_m=0.3, omega_lam=0.7,
                          halo_pos=galsim.PositionD(2.0, -1.0))
    x = np.array([0.5, 7.0, -15.0, 33.0, 80.0])
    y = np.array([3.0, -2.0, 11.0, -40.0, 5.0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # galsim's own numpy 'where' warning
        kap = halo.getConvergence((x, y), Z_S, units="arcsec")
        g1, g2 = halo.getShear((x, y), Z_S, units="arcsec", reduced=False)
    # 2e-3: galsim uses its own distance integration and constants; measured 1.0e-3 (the same
    # halo agrees with WB 2000 computed from astropy to 1e-6, see the test above)
    assert_allclose(lens.convergence(x, y, Z_S), kap, rtol=2e-3)
    s1, s2 = lens.shear(x, y, Z_S)
    assert_allclose(s1, g1, rtol=2e-3, atol=1e-6)
    assert_allclose(s2, g2, rtol=2e-3, atol=1e-6)


def test_elliptical_profiles_obey_poisson_equation():
    """SIE, elliptical NFW: kappa = div(alpha)/2, gamma from alpha's derivatives (SEF 1992)."""
    lens = _lens(LensComponentConfig(kind="sie", sigma_kms=300.0, axis_ratio=0.6,
                                     position_angle_deg=30.0),
                 LensComponentConfig(kind="nfw", mass_msun=5e14, concentration=6.0,
                                     axis_ratio=0.8, position_angle_deg=-20.0, x_arcsec=3.0))
    x = np.array([2.3, -4.1, 7.7])
    y = np.array([0.4, 3.1, -6.0])
    e = 1e-4  # central differences: truncation ~ e^2 x third derivative ~ 1e-7; rounding ~ 1e-12
    axp, ayp = lens.deflection(x + e, y, Z_S)
    axm, aym = lens.deflection(x - e, y, Z_S)
    bxp, byp = lens.deflection(x, y + e, Z_S)
    bxm, bym = lens.deflection(x, y - e, Z_S)
    dxx, dyx = (axp - axm) / (2 * e), (ayp - aym) / (2 * e)
    dxy, dyy = (bxp - bxm) / (2 * e), (byp - bym) / (2 * e)
    g1, g2 = lens.shear(x, y, Z_S)
    assert_allclose(lens.convergence(x, y, Z_S), 0.5 * (dxx + dyy), atol=1e-6)
    assert_allclose(g1, 0.5 * (dxx - dyy), atol=1e-6)
    assert_allclose(g2, dxy, atol=1e-6)
    assert_allclose(dxy, dyx, atol=1e-6)  # alpha is a gradient


# ---------------------------------------------------------------- images
def test_sis_images_and_magnifications():
    """SIS images at beta +/- theta_E with mu = |theta|/(|theta| - theta_E) (SEF 1992)."""
    lens = _lens(LensComponentConfig(kind="sis", sigma_kms=250.0))
    te = _sis_theta_e(250.0)
    beta = np.array([0.1, 0.45, 0.8, 1.6]) * te
    ang = np.deg2rad([0.0, 60.0, 135.0, 250.0])
    tab = find_images(lens, beta * np.cos(ang), beta * np.sin(ang), Z_S, 6 * te, te / 40)
    for k in range(4):
        rows = tab[tab["source"] == k]
        t_ref = np.array([beta[k] + te, beta[k] - te] if beta[k] < te else [beta[k] + te])
        assert len(rows) == len(t_ref)
        # signed position along the source direction
        t = rows["x_arcsec"] * np.cos(ang[k]) + rows["y_arcsec"] * np.sin(ang[k])
        assert_allclose(np.sort(t), np.sort(t_ref), atol=1e-6)  # Newton tolerance 1e-6"
        mu_ref = np.abs(t_ref) / (np.abs(t_ref) - te)
        order = np.argsort(t)
        assert_allclose(np.asarray(rows["mu"])[order], mu_ref[np.argsort(t_ref)], rtol=1e-5)
        assert_allclose(np.asarray(rows["parity"])[order], np.sign(mu_ref[np.argsort(t_ref)]))


def _nfw_shear_lens():
    return _lens(LensComponentConfig(kind="nfw", mass_msun=8e14, concentration=5.0),
                 LensComponentConfig(kind="shear", gamma1=0.05, gamma2=-0.03), ref=Z_S)


def _reference_fields(x, y):
    """kappa, gamma1, gamma2 and alpha of round NFW (WB 2000) + external shear (0.05, -0.03)."""
    r = np.hypot(x, y)
    kap, gam, alp = _wb_nfw(r, 8e14, 5.0)
    c2, s2 = (x**2 - y**2) / r**2, 2 * x * y / r**2
    g1 = -gam * c2 + 0.05
    g2 = -gam * s2 - 0.03
    ax = alp * x / r + 0.05 * x - 0.03 * y  # psi_ext = g1 (x^2 - y^2)/2 + g2 x y
    ay = alp * y / r - 0.03 * x - 0.05 * y
    return kap, g1, g2, ax, ay


def test_images_solve_lens_equation_and_mu_formula():
    """NFW + shear images solve beta = theta - alpha; mu = 1/((1-k)^2-|g|^2) (WB 2000, SEF)."""
    lens = _nfw_shear_lens()
    rng = np.random.default_rng(5)
    bx, by = rng.uniform(-2.5, 2.5, 40), rng.uniform(-2.5, 2.5, 40)
    tab = find_images(lens, bx, by, Z_S, 120.0, 0.1)
    assert (np.bincount(tab["source"], minlength=40) >= 3).sum() >= 5  # multiple images occur
    x, y = np.asarray(tab["x_arcsec"]), np.asarray(tab["y_arcsec"])
    kap, g1, g2, ax, ay = _reference_fields(x, y)
    s = np.asarray(tab["source"])
    assert_allclose(x - ax, bx[s], atol=1e-5)
    assert_allclose(y - ay, by[s], atol=1e-5)
    # 1e-4: near critical curves |mu| amplifies the 1e-7 error of the tabulated D_ls/D_s
    assert_allclose(tab["mu"], 1 / ((1 - kap) ** 2 - g1**2 - g2**2), rtol=1e-4)
    # odd number of images for a non-singular-free smooth lens when all are in the box
    assert np.all(np.bincount(s, minlength=40) % 2 == 1)


def test_critical_curve_of_sis_is_einstein_circle():
    """SIS tangential critical curve: the circle theta_E; its caustic: the point 0 (SEF 1992)."""
    lens = _lens(LensComponentConfig(kind="sis", sigma_kms=250.0))
    te = _sis_theta_e(250.0)
    cc = critical_curves(lens, Z_S, 4 * te, te / 50)
    assert len(cc.critical) == 1
    assert_allclose(np.hypot(*cc.critical[0].T), te, rtol=2e-3)  # det sampled every theta_E/50
    assert np.hypot(*cc.caustic[0].T).max() < 0.01 * te


def test_lens_png_is_written(tmp_path):
    """write_lens_png writes a PNG with the convergence map and curves (file signature check)."""
    lens = _nfw_shear_lens()
    out = tmp_path / "lens.png"
    write_lens_png(lens, out, 100.0, 0.25)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# ---------------------------------------------------------------- rendering
GRID = Grid(500, 500, 0.02, 150.0, 2.0)


def test_small_source_flux_is_magnification():
    """A small source's lensed flux = sum |mu| (SEF 1992), weak-lensing and ray-traced paths."""
    lens = _lens(LensComponentConfig(kind="sis", sigma_kms=250.0))
    te = _sis_theta_e(250.0)
    prof = galsim.Gaussian(sigma=0.01)
    # one image: weak-lensing transform; flux (theta_E + beta)/beta
    b = 2.2 * te
    tot = sum(s.sum() for s, _, _ in render_lensed(lens, prof, b, 0.0, Z_S, GRID))
    assert_allclose(tot, (b + te) / b, rtol=2e-3)  # finite source size ~ (sigma/beta)^2
    # two images, ray traced (exactly next to the singular centre): 2 theta_E / beta
    b = 0.5 * te
    st = render_lensed(lens, prof, 0.0, b, Z_S, GRID)
    assert len(st) == 2
    assert_allclose(sum(s.sum() for s, _, _ in st), 2 * te / b, rtol=1e-2)  # bilinear alpha


def test_surface_brightness_is_conserved():
    """Peak surface brightness of lensed images equals the source's (SEF 1992 section 5.1)."""
    lens = _lens(LensComponentConfig(kind="sis", sigma_kms=250.0))
    te = _sis_theta_e(250.0)
    sigma = 0.1
    prof = galsim.Gaussian(sigma=sigma)
    peak = 1.0 / (2 * np.pi * sigma**2)  # unit-flux Gaussian central surface brightness
    for b, force in ((0.4 * te, True), (1.8 * te, False)):
        img = _paint(render_lensed(lens, prof, b, 0.0, Z_S, GRID, force_ray_trace=force), GRID)
        # pixel average of a smooth peak of width >= 5 pixels: within 1%
        assert_allclose(img.max() / GRID.scale**2, peak, rtol=1e-2)
        if force:  # the fainter, counter image too: its brightest pixel has the same brightness
            xi, _ = GRID.pixel_offsets()
            assert_allclose(img[xi < 0].max() / GRID.scale**2, peak, rtol=2e-2)


def test_source_behind_round_lens_forms_ring():
    """A source exactly behind an SIS forms an Einstein ring of radius theta_E (SEF 1992)."""
    lens = _lens(LensComponentConfig(kind="sis", sigma_kms=250.0))
    te = _sis_theta_e(250.0)
    img = _paint(render_lensed(lens, galsim.Gaussian(sigma=0.02), 0.0, 0.0, Z_S, GRID), GRID)
    xi, eta = GRID.pixel_offsets()
    rad = np.hypot(xi, eta)
    assert_allclose((img * rad).sum() / img.sum(), te, rtol=5e-3)
    # azimuthally uniform: flux in each quadrant equal to 2%
    quads = [img[(xi >= 0) & (eta >= 0)].sum(), img[(xi < 0) & (eta >= 0)].sum(),
             img[(xi < 0) & (eta < 0)].sum(), img[(xi >= 0) & (eta < 0)].sum()]
    assert_allclose(quads, np.mean(quads), rtol=2e-2)


def test_rendered_image_fluxes_match_mu_formula():
    """Per-image flux of a small multiply imaged source = |mu| (WB 2000 + shear) at its images."""
    lens = _nfw_shear_lens()
    grid = Grid(2000, 2000, 0.02, 150.0, 2.0)
    bx, by = 0.247, -1.342  # three images, |mu| ~ 6-16
    tab = find_images(lens, [bx], [by], Z_S, 40.0, 0.1)
    assert len(tab) == 3
    img = _paint(render_lensed(lens, galsim.Gaussian(sigma=0.01), bx, by, Z_S, grid), grid)
    x, y = np.asarray(tab["x_arcsec"]), np.asarray(tab["y_arcsec"])
    kap, g1, g2, _, _ = _reference_fields(x, y)
    mu_ref = np.abs(1 / ((1 - kap) ** 2 - g1**2 - g2**2))
    xi, eta = grid.pixel_offsets()
    near = np.argmin((xi[..., None] - x) ** 2 + (eta[..., None] - y) ** 2, axis=-1)
    flux = np.bincount(near.ravel(), weights=img.ravel(), minlength=len(x))
    # 2%: deflection bilinear between nodes every 4 pixels, finite source (measured < 0.6%)
    assert_allclose(flux, mu_ref, rtol=2e-2)


def test_foreground_source_is_not_lensed():
    """A source in front of the lens keeps unit flux at its position (SEF: D_ls/D_s = 0)."""
    lens = _nfw_shear_lens()
    st = render_lensed(lens, galsim.Gaussian(sigma=0.05), 1.0, 1.0, 0.1, GRID)
    assert_allclose(sum(s.sum() for s, _, _ in st), 1.0, rtol=1e-6)
    tab = find_images(lens, [1.0], [1.0], 0.1, 20.0, 0.1)
    assert len(tab) == 1 and tab["mu"][0] == 1.0


def test_lens_sources_truth_columns():
    """lens_sources gives per-image rows and per-source totals consistent with find_images."""
    lens = _nfw_shear_lens()
    src = Table({"id": [5, 6, 7], "x_arcsec": [1.5, 15.0, 0.0], "y_arcsec": [-1.0, 0.0, 0.0],
                 "redshift": [Z_S, Z_S, 0.1]})
    images, total, n_images = lens_sources(lens, src, None, (-50, 50), (-50, 50))
    assert set(images["source_id"]) == {5, 6, 7}
    assert n_images[0] >= 3 and n_images[1] == 1 and n_images[2] == 1
    for k, sid in enumerate([5, 6, 7]):
        rows = images[images["source_id"] == sid]
        assert_allclose(total[k], np.abs(rows["magnification"]).sum(), rtol=1e-12)
        assert list(rows["image"]) == list(range(len(rows)))


# ---------------------------------------------------------------- members and configuration
def _bands():
    return [make_band("b13", 1300, 290, 0.35), make_band("b36", 3600, 800, 0.45)]


def test_members_follow_faber_jackson_and_config():
    """Members: count, kind, magnitudes, sigma ~ L^(1/4) (Faber & Jackson 1976), reproducible."""
    cfg = LensConfig(kind="cluster", redshift=0.35, n_members=60, member_mag_bright=19.0,
                     member_mag_faint=24.0,
                     components=[LensComponentConfig(kind="nfw", mass_msun=8e14,
                                                      x_arcsec=3.0, y_arcsec=-2.0)])
    t = make_members(cfg, _bands(), np.random.default_rng(4), (-50, 50), (-50, 50))
    t2 = make_members(cfg, _bands(), np.random.default_rng(4), (-50, 50), (-50, 50))
    assert len(t) == 60 and set(t["kind"]) == {"member"}
    assert_allclose(t["mag_b36"], t2["mag_b36"], rtol=0)
    assert np.all((t["mag_b36"] >= 19.0) & (t["mag_b36"] <= 24.0))
    assert_allclose([t["x_arcsec"][0], t["y_arcsec"][0]], [3.0, -2.0])  # BCG at the halo centre
    dm = np.asarray(t["mag_b36"]) - t["mag_b36"][0]
    assert_allclose(t["sigma_kms"] / t["sigma_kms"][0], 10 ** (-0.1 * dm), rtol=1e-10)
    # red early type: redder than flat f_nu between the bands (old stars, common practice)
    assert np.all(t["mag_b13"] > t["mag_b36"])
    # concentrated: median distance from the halo well below that of uniform points
    rng = np.random.default_rng(0)
    uni = np.median(np.hypot(rng.uniform(-50, 50, 4000) - 3.0, rng.uniform(-50, 50, 4000) + 2.0))
    assert np.median(np.hypot(t["x_arcsec"] - 3.0, t["y_arcsec"] + 2.0)) < 0.75 * uni


def test_members_become_lenses():
    """A member is a truncated SIS: alpha = theta_E (SEF 1992) near it, finite mass far out."""
    cfg = LensConfig(kind="cluster", redshift=Z_L, n_members=1, components=[])
    m = Table({"x_arcsec": [10.0], "y_arcsec": [-4.0], "sigma_kms": [180.0]})
    lens = build_lens(cfg, m, cosmo=COSMO)
    te = _sis_theta_e(180.0)
    ax, ay = lens.deflection(10.0, -4.0 + 0.01 * te, Z_S)
    assert_allclose([ax, ay], [0.0, te], rtol=2e-3, atol=1e-12)  # truncation: 1 - r/2a
    # far away the pseudo-Jaffe deflection tends to theta_E a / r, a = 40 kpc (sigma/200)^2 [mem]
    a = (40 * u.kpc * (180.0 / 200.0) ** 2 / COSMO.angular_diameter_distance(Z_L)).decompose()
    a = float(a) * ARCSEC
    r = 3000.0
    ax, _ = lens.deflection(10.0 + r, -4.0, Z_S)
    assert_allclose(ax, te * a / r, rtol=2 * a / r)  # next order: theta_E a^2 / (2 r^2)


def test_lens_config_validation_names_key():
    """Bad lens values raise ConfigError naming the key (project rule)."""
    from omegaconf import OmegaConf

    sc = OmegaConf.to_object(OmegaConf.merge(
        OmegaConf.structured(Scenario),
        {"telescope": OmegaConf.load("conf/telescope/lantern.yaml"),
         "population": OmegaConf.load("conf/population/evolving_lf.yaml"),
         "lens": OmegaConf.load("conf/lens/cluster.yaml"),
         "detector": OmegaConf.load("conf/detector/hgcdte.yaml"),
         "survey": OmegaConf.load("conf/survey/deep.yaml")}))
    validate(sc)
    sc.lens.components[0].kind = "blob"
    with pytest.raises(ConfigError, match=r"lens\.components\.0\.kind='blob'"):
        validate(sc)
    sc.lens.components[0].kind = "nfw"
    sc.lens.components[0].axis_ratio = 0.2
    with pytest.raises(ConfigError, match=r"lens\.components\.0\.axis_ratio"):
        validate(sc)


def test_default_cluster_makes_multiple_images():
    """conf/lens/cluster.yaml with members: many multiple-image systems at z_s = 1-10 (brief)."""
    from omegaconf import OmegaConf

    cfg = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(LensConfig),
                                              OmegaConf.load("conf/lens/cluster.yaml")))
    bands = _bands()
    lens = build_lens(cfg, make_members(cfg, bands, np.random.default_rng(1), (-50, 50),
                                        (-50, 50)))
    rng = np.random.default_rng(2)
    n = 1000  # uniform over the source plane behind the central 60" (~ the field's footprint)
    tab = find_images(lens, rng.uniform(-30, 30, n), rng.uniform(-30, 30, n),
                      rng.uniform(1, 10, n), 100.0, 0.2)
    assert (np.bincount(tab["source"], minlength=n) >= 3).sum() >= 15
    cc = critical_curves(lens, 9.0, 100.0, 0.2)
    area = [0.5 * abs(np.dot(c[:-1, 0], c[1:, 1]) - np.dot(c[1:, 0], c[:-1, 1]))
            for c in cc.critical]  # shoelace formula
    big = cc.critical[int(np.argmax(area))]
    radius = np.hypot(big[:, 0] - 3.0, big[:, 1] + 2.0).mean()
    assert 10.0 < radius < 40.0  # Einstein radii of massive clusters: 10-40" [mem]


@pytest.mark.parametrize("force, roll", [(False, 0.0), (True, 0.0), (False, 30.0), (True, 30.0)])
def test_single_image_matches_galsim_lens(force, roll):
    """A weakly lensed image equals GalSim's profile.lens(g1, g2, mu) with WB 2000 + shear fields."""
    lens = _nfw_shear_lens()
    bx, by = 14.0, 8.0
    tab = find_images(lens, [bx], [by], Z_S, 100.0, 0.1)
    assert len(tab) == 1
    x, y = float(tab["x_arcsec"][0]), float(tab["y_arcsec"][0])
    kap, g1, g2, _, _ = (float(v[0]) for v in _reference_fields(np.array([x]), np.array([y])))
    mu = 1 / ((1 - kap) ** 2 - g1**2 - g2**2)
    prof = galsim.Gaussian(sigma=0.08).shear(q=0.6, beta=25 * galsim.degrees)
    grid = Grid(201, 201, 0.02, 150.0, 2.0, roll_deg=roll, xi0=x, eta0=y)  # on the image
    img = _paint(render_lensed(lens, prof, bx, by, Z_S, grid, force_ray_trace=force), grid)
    # reduced shear g = gamma/(1-kappa) (SEF 1992); scene (column, row) = M (xi, eta) with
    # M = [[-cos, sin], [sin, cos]] of the roll (simfield.grid convention)
    c, s = np.cos(np.deg2rad(roll)), np.sin(np.deg2rad(roll))
    ref = prof.lens(g1 / (1 - kap), g2 / (1 - kap), mu).transform(-c, s, s, c)
    px, py = grid.offsets_to_pixel(x, y)
    expect = ref.drawImage(nx=201, ny=201, scale=0.02, offset=(px - 100, py - 100)).array
    # 1% of the peak (measured 0.25%): pixel integration differs, A varies across the image
    assert_allclose(img, expect, atol=1e-2 * expect.max())
    assert_allclose(img.sum(), abs(mu), rtol=1e-3)
