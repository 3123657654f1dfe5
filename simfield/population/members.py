"""Cluster member galaxies: red early types at the lens redshift, also galaxy-scale lenses.

Recipe (each ingredient marked with its source):

- magnitudes in the reddest band from a Schechter (1976, ApJ 203, 297) function in apparent
  magnitude, alpha = -1.0 for the red sequence [mem], m* from M*_550 = -21.5 AB [mem], between
  ``member_mag_bright`` and ``member_mag_faint``; the brightest galaxy (BCG, at
  ``member_mag_bright``) sits at the centre of the first NFW component;
- a simple early-type f_nu template (below) gives the other bands and the rest-UV magnitude;
- Faber & Jackson (1976, ApJ 204, 668) L ~ sigma^4: sigma = 220 km/s (L/L*)^(1/4) [mem for
  the normalisation];
- sizes r_e = 4 kpc (L/L*)^0.65 with 0.15 dex scatter, the early-type size-luminosity relation
  of Shen et al. 2003 (MNRAS 343, 978) [mem for the numbers]; Sersic n in [3.5, 4.5];
  axis ratios uniform in [0.5, 1] (common practice);
- positions from a cored isothermal surface density Sigma ~ 1 / (1 + (R/R_c)^2), R_c = 10"
  (common practice for cluster galaxy distributions), kept inside the field box.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u
from astropy.table import Column, Table

from ..bands import Band, band_average_fnu
from ..config import LensConfig
from ..cosmo import default_cosmology, distance_modulus

__all__ = ["make_members", "early_type_fnu", "MEMBER_COLUMNS"]

M_STAR_550 = -21.5  #: absolute AB magnitude of an L* early type at rest 550 nm [mem]
SIGMA_STAR_KMS = 220.0  #: velocity dispersion of an L* early type (km/s) [mem]
R_STAR_KPC = 4.0  #: effective radius of an L* early type (kpc) [mem]
SIZE_SLOPE = 0.65  #: r_e ~ L^0.65 (Shen et al. 2003) [mem]
SIZE_SCATTER_DEX = 0.15
LF_ALPHA = -1.0  #: faint-end slope of the red-sequence luminosity function [mem]
CORE_RADIUS_ARCSEC = 10.0
D4000 = 2.0  #: f_nu ratio across the 4000 A break of an old population [mem]

MEMBER_COLUMNS = ("id", "kind", "x_arcsec", "y_arcsec", "redshift", "abs_mag_uv", "r_half",
                  "r_half_kpc", "sersic_n", "axis_ratio", "position_angle", "sigma_kms",
                  "knot_fraction", "n_knots", "knot_seed")


def early_type_fnu(wave_rest_nm) -> np.ndarray:
    """Early-type f_nu shape (dimensionless, 1 at rest 550 nm) at rest wavelengths (nm).

    A broken power law: f_nu ~ lambda^1.5 from 400 nm to 1600 nm (the red optical/near-IR
    continuum of old stars), ~ lambda^-1.5 beyond the 1.6 micron peak, and below 400 nm a drop
    by D4000 = 2 followed by f_nu ~ lambda^3.5 into the ultraviolet (project's own template).
    """
    w = np.asarray(wave_rest_nm, dtype=float)
    base = (w / 550.0) ** 1.5
    red = (1600.0 / 550.0) ** 1.5 * (w / 1600.0) ** -1.5
    blue = (400.0 / 550.0) ** 1.5 / D4000 * (w / 400.0) ** 3.5
    return np.where(w < 400.0, blue, np.where(w > 1600.0, red, base))


def _draw_schechter_mags(rng, n, m_star, m_bright, m_faint, alpha):
    """n apparent magnitudes from a Schechter function in [m_bright, m_faint] (inverse CDF on
    a fine grid)."""
    m = np.linspace(m_bright, m_faint, 2001)
    x = 10.0 ** (-0.4 * (m - m_star))
    pdf = x ** (alpha + 1.0) * np.exp(-x)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pdf[1:] + pdf[:-1]) * np.diff(m))])
    return np.interp(rng.random(n) * cdf[-1], cdf, m)


def _draw_positions(rng, n, x0, y0, x_range, y_range):
    """Positions (arcsec) from Sigma ~ 1/(1 + (R/R_c)^2) around (x0, y0), inside the box."""
    rc = CORE_RADIUS_ARCSEC
    rmax = max(np.hypot(x - x0, y - y0) for x in x_range for y in y_range)
    xs, ys = np.zeros(0), np.zeros(0)
    while xs.size < n:
        k = 2 * (n - xs.size) + 8
        # N(<R) ~ ln(1 + (R/R_c)^2): inverse transform
        rr = rc * np.sqrt(np.expm1(rng.random(k) * np.log1p((rmax / rc) ** 2)))
        th = rng.random(k) * 2 * np.pi
        x, y = x0 + rr * np.cos(th), y0 + rr * np.sin(th)
        ok = (x >= x_range[0]) & (x <= x_range[1]) & (y >= y_range[0]) & (y <= y_range[1])
        xs, ys = np.concatenate([xs, x[ok]]), np.concatenate([ys, y[ok]])
    return xs[:n], ys[:n]


def make_members(lens_cfg: LensConfig, bands: list[Band], rng: np.random.Generator,
                 x_range=(-50.0, 50.0), y_range=(-50.0, 50.0), cosmo=None) -> Table:
    """Cluster member galaxies of a lens.

    Parameters
    ----------
    lens_cfg : LensConfig
        Uses redshift, n_members, member_mag_bright, member_mag_faint and the first NFW
        component's centre (else the field centre).
    bands : list of Band
        Every band gets a ``mag_<name>`` column; magnitudes are drawn in the reddest band.
    rng : numpy.random.Generator
    x_range, y_range : (float, float) (arcsec)
        Tangent-plane box (xi, eta) holding the members.
    cosmo : astropy cosmology, optional

    Returns
    -------
    astropy.table.Table
        Columns id (0; renumbered by the caller), kind ("member"), x_arcsec, y_arcsec
        (arcsec), redshift, abs_mag_uv (AB, rest 150 nm), mag_<band> (AB), r_half (arcsec),
        r_half_kpc (kpc), sersic_n, axis_ratio, position_angle (deg east of north),
        sigma_kms (km/s), knot_fraction (0), n_knots (0), knot_seed (0).
    """
    cosmo = cosmo or default_cosmology()
    n = int(lens_cfg.n_members) if lens_cfg.kind != "none" else 0
    z = float(lens_cfg.redshift)
    halos = [c for c in lens_cfg.components if c.kind == "nfw"]
    cx, cy = (halos[0].x_arcsec, halos[0].y_arcsec) if halos else (0.0, 0.0)

    # photometry: template band averages relative to rest 550 nm
    ref = int(np.argmax([b.pivot_nm for b in bands]))
    lo = min(b.wave.min() for b in bands)
    hi = max(b.wave.max() for b in bands)
    wave = np.geomspace(lo, hi, 3000)
    fnu = early_type_fnu(wave / (1.0 + z))
    band_fnu = np.array([band_average_fnu(fnu, wave, b) for b in bands])
    colour = -2.5 * np.log10(band_fnu / band_fnu[ref])  # m_b - m_ref
    # m = M_550 + DM - 2.5 log10(1+z) - 2.5 log10(<f_nu>_ref / f_nu(550 rest))
    dm = float(distance_modulus(z, cosmo))
    k_ref = -2.5 * np.log10(1.0 + z) - 2.5 * np.log10(band_fnu[ref])
    m_star = M_STAR_550 + dm + k_ref

    m_ref = np.zeros(0)
    if n > 0:
        m_ref = _draw_schechter_mags(rng, n, m_star, lens_cfg.member_mag_bright,
                                     lens_cfg.member_mag_faint, LF_ALPHA)
        m_ref[0] = lens_cfg.member_mag_bright  # the BCG
    x, y = _draw_positions(rng, n, cx, cy, x_range, y_range)
    if n > 0:
        x[0], y[0] = cx, cy
    lum = 10.0 ** (-0.4 * (m_ref - m_star))  # L / L*
    d_a_kpc = cosmo.angular_diameter_distance(z).to_value(u.kpc)
    r_kpc = R_STAR_KPC * lum**SIZE_SLOPE * 10.0 ** (SIZE_SCATTER_DEX * rng.standard_normal(n))
    abs_550 = m_ref - dm - k_ref
    uv = -2.5 * np.log10(early_type_fnu(150.0))

    t = Table()
    t["id"] = np.zeros(n, dtype=np.int64)
    t["kind"] = np.full(n, "member", dtype="U6")
    t["x_arcsec"] = Column(x, unit="arcsec")
    t["y_arcsec"] = Column(y, unit="arcsec")
    t["redshift"] = np.full(n, z)
    t["abs_mag_uv"] = Column(abs_550 + uv, unit="mag")
    for i, b in enumerate(bands):
        t[f"mag_{b.name}"] = Column(m_ref + colour[i], unit="mag")
    t["r_half"] = Column(r_kpc / d_a_kpc * (180.0 / np.pi * 3600.0), unit="arcsec")
    t["r_half_kpc"] = Column(r_kpc, unit="kpc")
    t["sersic_n"] = rng.uniform(3.5, 4.5, n)
    t["axis_ratio"] = rng.uniform(0.5, 1.0, n)
    t["position_angle"] = Column(rng.uniform(0.0, 180.0, n), unit="deg")
    t["sigma_kms"] = Column(SIGMA_STAR_KMS * lum**0.25, unit="km / s")
    t["knot_fraction"] = np.zeros(n)
    t["n_knots"] = np.zeros(n, dtype=np.int32)
    t["knot_seed"] = np.zeros(n, dtype=np.int64)
    t.meta["member_m_star"] = float(m_star)
    t.meta["member_reference_band"] = bands[ref].name
    return t
