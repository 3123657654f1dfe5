"""The truth table of all sources of a field: light-cone galaxies and foreground stars.

``make_population`` draws, in this order from one generator: galaxies (redshift and rest-UV
magnitude from :mod:`.luminosity`, or the uniform injection mode), their templates and spectra
(:mod:`.seds`), their shapes (:mod:`.morphology`), the stars (:mod:`.stars`), and positions
uniform over the given tangent-plane ranges.

Only galaxies whose apparent magnitude in the selection band could pass ``mag_limit`` are drawn:
for every redshift the brightest selection-band colour each template can have (its parameters at
their extreme deviates, which are clipped at 4 sigma; the band flux grows with the optical slope
and the break and is convex in beta, so the ends of each range bound it) gives the faintest
M_UV that can still pass, with a 0.05 mag margin; galaxies beyond that are never drawn, the rest
are cut exactly on their synthetic magnitude.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from astropy.table import Column, Table
from scipy.interpolate import CubicSpline

from ..bands import Band
from ..config import PopulationConfig
from ..cosmo import angular_diameter_distance, default_cosmology
from ..errors import ConfigError, require
from .luminosity import draw_redshift_magnitude, expected_counts, uv_lf_parameters
from .morphology import Morphology, draw_morphology
from .seds import (BETA_SCATTER, band_magnitudes, band_weight_matrix, evolved_probability,
                   galaxy_fnu, rest_fnu_shape, sed_parameters_from_deviates, uv_slope_relation,
                   wave_grid)
from .stars import draw_stars, star_band_magnitudes

__all__ = ["make_population", "expected_galaxies", "selection_band_index", "COLUMN_UNITS"]

#: Units of the table columns (unit strings as astropy writes them).
COLUMN_UNITS = {
    "x_arcsec": "arcsec", "y_arcsec": "arcsec", "abs_mag_uv": "mag", "r_half": "arcsec",
    "r_half_kpc": "kpc", "position_angle": "deg", "teff": "K",
}
_CHUNK = 4096  # galaxies per spectrum batch (4096 x ~400 wavelengths ~ 13 MB)
_MARGIN_MAG = 0.05  # safety margin of the pre-selection envelope (mag)
_ENVELOPE_BETAS = np.linspace(-3.2, 0.5, 16)


def selection_band_index(pop: PopulationConfig, bands: Sequence[Band]) -> int:
    """Index of the selection band: ``pop.selection_band`` or else the reddest band."""
    names = [b.name for b in bands]
    if pop.selection_band:
        require(pop.selection_band in names, "population.selection_band", pop.selection_band,
                f"must be empty or one of: {', '.join(names)}")
        return names.index(pop.selection_band)
    return int(np.argmax([b.pivot_nm for b in bands]))


class _Distances:
    """Angular-diameter distance and distance modulus by a cubic spline of ln D_A in ln(1+z),
    tabulated once per call from the astropy cosmology (300 nodes: < 1e-5 mag)."""

    def __init__(self, z_lo, z_hi, cosmo):
        u = np.linspace(np.log1p(0.9 * z_lo), np.log1p(1.01 * z_hi), 300)
        self._spline = CubicSpline(u, np.log(angular_diameter_distance(np.expm1(u), cosmo)))

    def d_a(self, z):
        """D_A (Mpc)."""
        return np.exp(self._spline(np.log1p(z)))

    def dm(self, z):
        """DM = 5 log10(D_A (1+z)^2 / 10 pc) (mag)."""
        return 5.0 * np.log10(self.d_a(z) * (1.0 + z) ** 2) + 25.0


class _Photometry:
    """Wavelength grid, band weights and distances shared by every spectrum of one call."""

    def __init__(self, bands, sel, dist):
        self.wave = wave_grid(bands)
        self.weights = band_weight_matrix(self.wave, bands)
        self.sel = sel
        self.dist = dist
        used = self.weights[:, sel] > 0
        self.sel_wave = self.wave[used]
        self.sel_weights = self.weights[used][:, [sel]]

    def mags(self, z, m_uv, beta, brk, beta_opt, selection_only=False):
        """Band magnitudes (n, n_band), or (n, 1) in the selection band only; in batches."""
        wave, w = (self.sel_wave, self.sel_weights) if selection_only else \
            (self.wave, self.weights)
        out = np.empty((len(z), w.shape[1]))
        dm = self.dist.dm(z)
        for s in range(0, len(z), _CHUNK):
            sl = slice(s, s + _CHUNK)
            f = galaxy_fnu(wave, z[sl], m_uv[sl], beta[sl], brk[sl], beta_opt[sl],
                           dist_mod=dm[sl])
            out[sl] = band_magnitudes(wave, f, [], weights=w)
        return out


class _Envelope:
    """Faintest colour (m_sel - m_1500) each template can have, on a redshift grid."""

    def __init__(self, phot: _Photometry, z_min, z_max, mag_limit):
        self.z = np.linspace(z_min, z_max, max(60, int(np.ceil((z_max - z_min) / 0.05)) + 1))
        self.mag_limit = mag_limit
        nz, nb = self.z.size, _ENVELOPE_BETAS.size
        m_flat = phot.dist.dm(self.z) - 2.5 * np.log10(1.0 + self.z)
        # star-forming: every beta of the grid with beta_opt and break at their +4 sigma values
        zz = np.repeat(self.z, nb)
        bb = np.tile(_ENVELOPE_BETAS, nz)
        bo = np.clip(bb + 0.8, -2.2, 0.5) + 0.15 * 4.0
        br = np.full(zz.size, 10.0 ** (np.log10(1.25) + 0.08 * 4.0))
        k_sf = phot.mags(zz, np.zeros(zz.size), bb, br, bo, True)[:, 0].reshape(nz, nb)
        k_sf -= m_flat[:, None]
        # redder-or-equal betas could all occur: running minimum along beta
        self.k_sf = np.minimum.accumulate(k_sf, axis=1)
        # evolved: band flux rises with beta_opt and the break but is convex in beta (a sum of
        # exponentials in beta), so its largest value is at an end of beta's range [0, 2]
        ones = np.ones(nz)
        k_ev = [phot.mags(self.z, 0 * ones, b * ones, 2.6 * ones, 0.1 * ones, True)[:, 0]
                for b in (0.0, 2.0)]
        self.k_ev = np.minimum(*k_ev) - m_flat
        self.m_flat = m_flat

    def _cell(self, z):
        i = np.clip(np.searchsorted(self.z, z), 1, self.z.size - 1)
        return i - 1, i

    def passes(self, z, m_uv):
        """(star-forming could pass, evolved could pass) for galaxies at (z, M_UV)."""
        z = np.asarray(z, dtype=float)
        a, b = self._cell(z)
        m_flat = np.interp(z, self.z, self.m_flat)
        beta_max = np.minimum(uv_slope_relation(z, m_uv) + 4.0 * BETA_SCATTER, 0.5)
        j = np.clip(np.searchsorted(_ENVELOPE_BETAS, beta_max), 0, _ENVELOPE_BETAS.size - 1)
        k_sf = np.minimum(self.k_sf[a, j], self.k_sf[b, j])
        k_ev = np.minimum(self.k_ev[a], self.k_ev[b])
        lim = self.mag_limit + _MARGIN_MAG
        return m_uv + m_flat + k_sf < lim, m_uv + m_flat + k_ev < lim


def _check_inputs(pop, bands, xi, eta):
    require(len(bands) > 0, "bands", list(bands), "must hold at least one band")
    for key, rng_ in (("field_xi_arcsec", xi), ("field_eta_arcsec", eta)):
        require(len(rng_) == 2 and rng_[1] > rng_[0], key, tuple(rng_),
                "must be (lo, hi) with hi > lo (arcsec)")


def _lf_weight(pop, phot):
    """(envelope, weight(z, M)): the fraction of galaxies at (z, M) that could pass the limit."""
    env = _Envelope(phot, pop.z_min, pop.z_max, pop.mag_limit)

    def weight(z, m):
        ms = uv_lf_parameters(z).m_star
        p = evolved_probability(z, m, ms)
        ok_sf, ok_ev = env.passes(z, m)
        return (1.0 - p) * ok_sf + p * ok_ev

    return env, weight


def expected_galaxies(pop: PopulationConfig, bands: list[Band], area_arcsec2: float,
                      cosmo=None) -> float:
    """Mean number of candidate galaxies :func:`make_population` draws over ``area_arcsec2``
    (the number it compares with ``pop.max_sources``), without drawing any.

    Parameters
    ----------
    pop : PopulationConfig
    bands : list of Band
    area_arcsec2 : float (arcsec^2)
        Solid angle the sources are spread over.
    cosmo : astropy cosmology, optional
        Default :func:`simfield.cosmo.default_cosmology`.
    """
    if pop.mode == "uniform":
        return pop.uniform_density_arcmin2 * area_arcsec2 / 3600.0
    cosmo = cosmo or default_cosmology()
    phot = _Photometry(bands, selection_band_index(pop, bands),
                       _Distances(pop.z_min, pop.z_max, cosmo))
    _, weight = _lf_weight(pop, phot)
    return expected_counts(pop.z_min, pop.z_max, pop.abs_mag_faint, area_arcsec2, cosmo=cosmo,
                           weight=weight)


def _galaxies_from_lf(pop, phot, area, rng, cosmo):
    env, weight = _lf_weight(pop, phot)
    try:
        draw = draw_redshift_magnitude(pop.z_min, pop.z_max, pop.abs_mag_faint, area, rng,
                                       weight=weight, cosmo=cosmo,
                                       max_expected=pop.max_sources)
    except OverflowError as exc:
        raise ConfigError("population.max_sources", pop.max_sources,
                          f"is too small: {exc}; raise it or lower population.mag_limit / "
                          "population.abs_mag_faint") from None
    z, m = draw.redshift, draw.abs_mag
    p = evolved_probability(z, m, uv_lf_parameters(z).m_star)
    ok_sf, ok_ev = env.passes(z, m)
    w = (1.0 - p) * ok_sf + p * ok_ev
    p_ev = np.divide(p * ok_ev, w, out=np.zeros_like(w), where=w > 0)
    evolved = rng.random(z.size) < p_ev
    sed = sed_parameters_from_deviates(z, m, evolved, rng.standard_normal((3, z.size)))
    m_sel = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, True)[:, 0]
    keep = (w > 0) & (m_sel < pop.mag_limit)
    z, m = z[keep], m[keep]
    mags = phot.mags(z, m, sed.beta[keep], sed.break_strength[keep], sed.beta_opt[keep])
    return z, m, evolved[keep], sed, keep, mags, draw.expected


def _galaxies_uniform(pop, phot, area, rng, cosmo, bands):
    sel_band = bands[phot.sel]
    lyman_edge = 121.567 * (1.0 + pop.z_max)
    require(lyman_edge < sel_band.pivot_nm, "population.z_max", pop.z_max,
            f"puts Lyman alpha ({lyman_edge:.0f} nm) redward of the selection band "
            f"{sel_band.name} (pivot {sel_band.pivot_nm:.0f} nm): uniform mode needs "
            "sources visible in that band")
    expected = pop.uniform_density_arcmin2 * area / 3600.0
    if expected > pop.max_sources:
        raise ConfigError("population.max_sources", pop.max_sources,
                          f"is too small: {expected:.0f} sources expected")
    n = int(rng.poisson(expected))
    mag = pop.uniform_mag_min + (pop.uniform_mag_max - pop.uniform_mag_min) * rng.random(n)
    z = pop.z_min + (pop.z_max - pop.z_min) * rng.random(n)
    m = mag - phot.dist.dm(z) + 2.5 * np.log10(1.0 + z)
    evolved = rng.random(n) < evolved_probability(z, m, uv_lf_parameters(z).m_star)
    dev = rng.standard_normal((3, n))
    # M_UV such that the selection-band magnitude is the drawn one; beta depends weakly on M_UV
    # (d beta / d M ~ -0.2), so a few fixed-point steps converge to < 1e-4 mag
    for _ in range(4):
        sed = sed_parameters_from_deviates(z, m, evolved, dev)
        m_sel = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, True)[:, 0]
        m = m + (mag - m_sel)
    sed = sed_parameters_from_deviates(z, m, evolved, dev)
    mags = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt)
    keep = np.ones(n, dtype=bool)
    return z, m, evolved, sed, keep, mags, expected


def make_population(pop: PopulationConfig, bands: list[Band], field_xi_arcsec: tuple,
                    field_eta_arcsec: tuple, rng: np.random.Generator, cosmo=None) -> Table:
    """All sources of a field (galaxies, then stars) as an astropy Table.

    Parameters
    ----------
    pop : PopulationConfig
        ``mode`` ``luminosity_function`` (light cone) or ``uniform`` (injection: uniform in
        selection-band magnitude and redshift, ``uniform_density_arcmin2`` per arcmin^2).
    bands : list of Band
        Every band gets a ``mag_<name>`` column.
    field_xi_arcsec, field_eta_arcsec : (float, float) (arcsec)
        Tangent-plane ranges (xi east, eta north) over which sources are spread uniformly.
    rng : numpy.random.Generator
    cosmo : astropy cosmology, optional
        Default :func:`simfield.cosmo.default_cosmology`.

    Returns
    -------
    astropy.table.Table
        Columns: id (1..N), kind (galaxy/star), x_arcsec, y_arcsec (xi, eta; arcsec),
        redshift, abs_mag_uv (AB, rest 1500 A; NaN for stars), mag_<band> (intrinsic AB),
        r_half (arcsec), r_half_kpc, sersic_n, axis_ratio, position_angle (deg east of north),
        beta_uv, beta_opt, break_strength, template (starforming/evolved/star), knot_fraction,
        n_knots, knot_seed, teff (K, stars; NaN for galaxies).
    """
    _check_inputs(pop, bands, field_xi_arcsec, field_eta_arcsec)
    cosmo = cosmo or default_cosmology()
    sel = selection_band_index(pop, bands)
    (x0, x1), (y0, y1) = field_xi_arcsec, field_eta_arcsec
    area = (x1 - x0) * (y1 - y0)
    phot = _Photometry(bands, sel, _Distances(pop.z_min, pop.z_max, cosmo))
    if pop.mode == "uniform":
        z, m, evolved, sed, keep, mags, expected = _galaxies_uniform(pop, phot, area, rng, cosmo,
                                                                     bands)
    else:
        z, m, evolved, sed, keep, mags, expected = _galaxies_from_lf(pop, phot, area, rng, cosmo)
    ng = z.size
    shape = rest_fnu_shape(550.0, sed.beta[keep], sed.break_strength[keep], sed.beta_opt[keep])
    morph: Morphology = draw_morphology(z, m, evolved, rng, clumpy=pop.clumpy,
                                        abs_mag_opt=m - 2.5 * np.log10(shape),
                                        d_a_mpc=phot.dist.d_a(z))
    stars = draw_stars(pop.star_density_arcmin2, pop.star_mag_min, pop.star_mag_max, area, rng,
                       slope_dex=pop.star_count_slope)
    ns = stars.mag.size
    star_mags = star_band_magnitudes(stars.mag, stars.teff, bands, sel) if ns else \
        np.zeros((0, len(bands)))
    n = ng + ns
    x = x0 + (x1 - x0) * rng.random(n)
    y = y0 + (y1 - y0) * rng.random(n)

    nan_s = np.full(ns, np.nan)
    cat = lambda g, s: np.concatenate([np.asarray(g, dtype=float), s])  # noqa: E731
    t = Table()
    t["id"] = np.arange(1, n + 1, dtype=np.int64)
    t["kind"] = np.array(["galaxy"] * ng + ["star"] * ns, dtype="U6")
    t["x_arcsec"] = x
    t["y_arcsec"] = y
    t["redshift"] = cat(z, np.zeros(ns))
    t["abs_mag_uv"] = cat(m, nan_s)
    for i, b in enumerate(bands):
        t[f"mag_{b.name}"] = Column(np.concatenate([mags[:, i], star_mags[:, i]]), unit="mag")
    t["r_half"] = cat(morph.r_half, np.zeros(ns))
    t["r_half_kpc"] = cat(morph.r_half_kpc, np.zeros(ns))
    t["sersic_n"] = cat(morph.sersic_n, nan_s)
    t["axis_ratio"] = cat(morph.axis_ratio, np.ones(ns))
    t["position_angle"] = cat(morph.position_angle, np.zeros(ns))
    t["beta_uv"] = cat(sed.beta[keep], nan_s)
    t["beta_opt"] = cat(sed.beta_opt[keep], nan_s)
    t["break_strength"] = cat(sed.break_strength[keep], nan_s)
    t["template"] = np.concatenate([np.where(evolved, "evolved", "starforming"),
                                    np.full(ns, "star")]).astype("U11")
    t["knot_fraction"] = cat(morph.knot_fraction, np.zeros(ns))
    t["n_knots"] = np.concatenate([morph.n_knots, np.zeros(ns, dtype=int)]).astype(np.int32)
    t["knot_seed"] = np.concatenate([morph.knot_seed, np.zeros(ns, dtype=int)]).astype(np.int64)
    t["teff"] = cat(np.full(ng, np.nan), stars.teff)
    for name, unit in COLUMN_UNITS.items():
        t[name].unit = unit
    sel_name = bands[sel].name
    t.meta.update({
        "population_mode": pop.mode,
        "selection_band": sel_name,
        "mag_limit": pop.mag_limit,
        "expected_candidates": float(expected),  # drawn before the exact magnitude cut
        "cosmology": repr(cosmo),
        "positions": "x_arcsec, y_arcsec: tangent-plane offsets xi (east), eta (north) from "
                     "the field centre (arcsec)",
        "magnitudes": "intrinsic (unlensed) AB magnitudes, synthetic photometry",
        "position_angle": "major axis, degrees east of north",
    })
    return t
