"""Two-component galaxies: a de Vaucouleurs-like bulge plus an exponential disk.

Model
-----
* Bulge: Sersic n = 4; disk: Sersic n = 1; both truncated at
  :data:`.morphology.TRUNCATION_RADII` half-light radii (the radii refer to the truncated
  profiles, as GalSim draws them), sharing the galaxy's axis ratio and position angle, so the
  circularised half-light radius of the sum follows from the 1-D enclosed-flux curves
  (:func:`composite_half_light_radius`).
* Bulge-to-total ratio at rest 550 nm, ``bulge_fraction``, from a Beta distribution (mean m,
  concentration 8) whose mean rises with rest-550 nm luminosity: star-forming galaxies m =
  0.15 - 0.08 (M_550 + 21) in [0.03, 0.5]; evolved and quiescent m = 0.6 - 0.05 (M_550 + 21) in
  [0.4, 0.85] (B/T grows with stellar mass, ~0.1-0.2 for star-forming galaxies of ~10^10 Msun
  and ~0.5 near 10^11 Msun, quiescent galaxies bulge-dominated: Lang et al. 2014, ApJ 788, 11
  [from memory, approximate]).
* Bulge-to-disk size ratio r_b / r_d log-normal, median 0.4, 0.15 dex (r_e,bulge / h_disk ~
  0.2-0.5 in local disks, Gadotti 2009, MNRAS 393, 1531 [from memory]).
* Spectra: the bulge has the evolved template's central shape (beta 1.0, break 1.9, beta_opt
  -0.7, no lines, :mod:`.seds`); the disk carries the rest of the galaxy's light. In each band
  the bulge-to-disk flux ratio is the rest-550 nm one times the colour of the bulge template
  relative to the galaxy's own template (both continua, IGM included, no dust or lines):
  odds_band = odds_550 * [F_band / F_550]_bulge / [F_band / F_550]_galaxy. The galaxy's total
  magnitudes are unchanged; B/T and the half-light radius change with wavelength (larger B/T
  and smaller radius in red bands). Evolved and quiescent galaxies have bulges of their own
  spectrum (no colour gradient).
* Sizes: the galaxy's ``r_half`` (from :mod:`.sizes`) is the half-light radius of the sum at
  the relation's rest wavelength (150 nm star-forming, 550 nm evolved), which fixes the disk
  radius.

Cost: only galaxies brighter than ``population.bulge_mag_max`` in the selection band (default
27 AB) get two components; fainter ones keep one Sersic profile. At the default depth (5 sigma
~29-30 AB in 0.3" apertures) a 27 AB galaxy has S/N ~ 30, and most fainter galaxies are at
high redshift with r_half ~ PSF, where a bulge inside the disk is below the noise of one
resolution element; a second stamp is drawn for the rest only. Galaxies whose B/T stays
below :data:`BT_MIN` (5 %) in every band also keep one profile: such a bulge changes the
light profile by less than the noise of all but the brightest galaxies.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from astropy.table import Table
from scipy.optimize import brentq
from scipy.special import betaincinv, gammainc, ndtri

from .morphology import TRUNCATION_RADII
from .seds import rest_fnu_shape

__all__ = ["BULGE_N", "DISK_N", "BULGE_SED", "enclosed_fraction",
           "composite_half_light_radius", "mean_bulge_fraction", "band_bulge_fractions",
           "add_components", "source_bulge_fractions"]

BULGE_N = 4.0
DISK_N = 1.0
#: Rest-frame template parameters of the bulge spectrum (beta, break_strength, beta_opt).
BULGE_SED = (1.0, 1.9, -0.7)
_CONCENTRATION = 8.0
_SIZE_RATIO, _SIZE_RATIO_DEX = 0.4, 0.15
_EVOLVED = ("evolved", "quiescent")
_STREAM = 0xB0D  # mixed with knot_seed for the bulge draws
BT_MIN = 0.05  #: smallest B/T (largest over the bands) drawn as a second component


@lru_cache(maxsize=8)
def _sersic_k(n: float) -> float:
    """k with P(2n, k) / P(2n, k 5^(1/n)) = 1/2: the truncated profile's half-light radius."""
    xt = TRUNCATION_RADII ** (1.0 / n)
    return brentq(lambda k: gammainc(2 * n, k) / gammainc(2 * n, k * xt) - 0.5, 1e-3, 50.0)


def enclosed_fraction(r_over_rhalf, n: float):
    """Fraction of a truncated Sersic profile's light inside radius r (in units of its
    half-light radius; 1 beyond the truncation)."""
    k = _sersic_k(float(n))
    x = np.minimum(np.asarray(r_over_rhalf, dtype=float), TRUNCATION_RADII)
    return gammainc(2 * n, k * x ** (1.0 / n)) / gammainc(2 * n, k * TRUNCATION_RADII ** (1 / n))


def composite_half_light_radius(bt, r_bulge, r_disk):
    """Half-light radius (units of the inputs) of bulge (n = 4, ``r_bulge``) plus disk (n = 1,
    ``r_disk``) with bulge fraction ``bt``; bisection in ln r between the two radii."""
    bt, rb, rd = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (bt, r_bulge, r_disk)))
    lo = np.log(np.minimum(rb, rd))
    hi = np.log(np.maximum(rb, rd))
    rb_safe = np.where(rb > 0, rb, 1.0)
    for _ in range(48):
        mid = 0.5 * (lo + hi)
        r = np.exp(mid)
        f = bt * enclosed_fraction(r / rb_safe, BULGE_N) + (1 - bt) * enclosed_fraction(
            r / rd, DISK_N)
        below = f < 0.5
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return np.exp(0.5 * (lo + hi))


def mean_bulge_fraction(abs_mag_opt, evolved):
    """Mean rest-550 nm B/T of the module docstring (``abs_mag_opt`` AB mag)."""
    m = np.asarray(abs_mag_opt, dtype=float) + 21.0
    return np.where(np.asarray(evolved, dtype=bool), np.clip(0.6 - 0.05 * m, 0.4, 0.85),
                    np.clip(0.15 - 0.08 * m, 0.03, 0.5))


def band_bulge_fractions(bt550, colour_ratio):
    """B/T in each band from the rest-550 nm B/T and the bulge-to-galaxy colour ratio
    [F_band / F_550]_bulge / [F_band / F_550]_galaxy (same shape as the result)."""
    bt550 = np.asarray(bt550, dtype=float)
    odds = bt550 / (1.0 - bt550)
    odds_b = odds[..., None] * colour_ratio if np.ndim(colour_ratio) > bt550.ndim else \
        odds * colour_ratio
    return odds_b / (1.0 + odds_b)


def _colour_ratios(phot, z, beta, brk, beta_opt, evolved, wave_ref):
    """(colour ratio per band (n, n_band), colour ratio at rest ``wave_ref`` (n,))."""
    n = z.size
    bb, bk, bo = (np.where(evolved, g, np.full(n, s)) for g, s in
                  zip((beta, brk, beta_opt), BULGE_SED))
    zeros = np.zeros(n)
    m_gal = phot.mags(z, zeros, beta, brk, beta_opt)
    m_bul = phot.mags(z, zeros, bb, bk, bo)
    s_gal = rest_fnu_shape(550.0, beta, brk, beta_opt)
    s_bul = rest_fnu_shape(550.0, bb, bk, bo)
    norm = s_gal / s_bul
    with np.errstate(invalid="ignore"):  # no flux in either (blue of Lyman alpha): ratio 1
        c_band = 10.0 ** (-0.4 * (m_bul - m_gal)) * norm[:, None]
    c_ref = rest_fnu_shape(wave_ref, bb, bk, bo) / rest_fnu_shape(wave_ref, beta, brk,
                                                                  beta_opt) * norm
    return np.nan_to_num(c_band, nan=1.0), c_ref


def add_components(t: Table, phot, bands, mag_max: float) -> None:
    """Give the galaxies of ``t`` (kinds galaxy, dusty, quiescent) brighter than ``mag_max``
    in the selection band a bulge and a disk (module docstring); in place.

    Adds ``n_components`` (1 or 2), ``bulge_fraction`` (B/T at rest 550 nm), ``r_half_bulge``
    and ``r_half_disk`` (arcsec), and per band ``bt_<band>`` and ``r_half_<band>`` (arcsec, the
    half-light radius of the sum in that band). One-component rows: B/T 0, disk radius =
    ``r_half``, bulge radius 0. ``r_half`` and ``r_half_kpc`` stay the size at the size
    relation's rest wavelength. The draws come from each galaxy's ``knot_seed``.
    """
    n_rows = len(t)
    kind = np.asarray(t["kind"]).astype(str)
    template = np.asarray(t["template"]).astype(str)
    sel = np.asarray(t[f"mag_{bands[phot.sel].name}"], float)
    two = np.isin(kind, ("galaxy", "dusty", "quiescent")) & (sel < mag_max)
    idx = np.nonzero(two)[0]
    n = idx.size
    r_half = np.asarray(t["r_half"], float)
    bt550 = np.zeros(n_rows)
    bt_band = np.zeros((n_rows, len(bands)))
    r_b = np.zeros(n_rows)
    r_d = r_half.copy()
    r_band = np.repeat(r_half[:, None], len(bands), axis=1)
    # two uniform deviates per galaxy from its own knot_seed (itself drawn from the run's
    # stream): a galaxy's bulge depends on no other family (switching families off)
    seeds = np.asarray(t["knot_seed"], np.int64)
    u = np.zeros((2, n_rows))
    for i in idx:
        u[:, i] = np.random.default_rng([int(seeds[i]), _STREAM]).random(2)
    if n:
        z = np.asarray(t["redshift"], float)[idx]
        beta, brk, bo = (np.asarray(t[c], float)[idx] for c in
                         ("beta_uv", "break_strength", "beta_opt"))
        evolved = np.isin(template[idx], _EVOLVED)
        m_opt = np.asarray(t["abs_mag_uv"], float)[idx] - 2.5 * np.log10(
            rest_fnu_shape(550.0, beta, brk, bo))
        mean = mean_bulge_fraction(m_opt, evolved)
        bt = betaincinv(mean * _CONCENTRATION, (1 - mean) * _CONCENTRATION, u[0, idx])
        bt = np.clip(bt, 1e-4, 1 - 1e-4)
        ratio = _SIZE_RATIO * 10.0 ** (_SIZE_RATIO_DEX * np.clip(
            ndtri(u[1, idx]), -4, 4))
        wave_ref = np.where(evolved, 550.0, 150.0)
        c_band, c_ref = _colour_ratios(phot, z, beta, brk, bo, evolved, wave_ref)
        bt_ref = band_bulge_fractions(bt, c_ref)
        h_ref = composite_half_light_radius(bt_ref, ratio, 1.0)
        disk = r_half[idx] / h_ref
        bt_b = band_bulge_fractions(bt, c_band)
        # a bulge below BT_MIN of the light in every band stays out (one Sersic profile)
        keep = bt_b.max(axis=1) >= BT_MIN
        two[idx[~keep]] = False
        idx, bt, bt_b, disk, ratio = idx[keep], bt[keep], bt_b[keep], disk[keep], ratio[keep]
        bt550[idx] = bt
        bt_band[idx] = bt_b
        r_d[idx] = disk
        r_b[idx] = ratio * disk
        r_band[idx] = disk[:, None] * composite_half_light_radius(bt_b, ratio[:, None], 1.0)
    t["n_components"] = np.where(two, 2, 1).astype(np.int16)
    t["bulge_fraction"] = bt550
    t["r_half_bulge"] = r_b
    t["r_half_disk"] = r_d
    point = ~np.isin(kind, ("galaxy", "dusty", "quiescent", "member", "icl"))
    for i, b in enumerate(bands):
        t[f"bt_{b.name}"] = np.where(point, 0.0, bt_band[:, i])
        t[f"r_half_{b.name}"] = np.where(point, 0.0, r_band[:, i])
    for c in ["r_half_bulge", "r_half_disk"] + [f"r_half_{b.name}" for b in bands]:
        t[c].unit = "arcsec"
    t["r_half_disk"][point] = 0.0



def source_bulge_fractions(sources: Table, bands) -> dict:
    """Band name -> B/T (dimensionless) per row of a SOURCES table (0 where a row has none:
    masked in rows stacked without the column, e.g. cluster members), or band name -> None
    when the table has no bulge + disk galaxies (no ``n_components`` column).

    ``bands``: the band names (str) of the table's ``bt_<band>`` columns.
    """
    if "n_components" not in sources.colnames:
        return {b: None for b in bands}
    return {b: np.asarray(np.ma.filled(sources[f"bt_{b}"], 0.0), float) for b in bands}
