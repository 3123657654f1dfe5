"""The truth table of all sources of a field: light-cone galaxies, stars and contaminants.

``make_population`` draws, in this order from one generator: galaxies (redshift and magnitude
from :mod:`.luminosity`, or the uniform injection mode), their templates, emission
lines and spectra (:mod:`.seds`, :mod:`.lines`), their shapes (:mod:`.morphology`), the stars
(:mod:`.stars`), positions uniform over the given tangent-plane ranges; then the contaminant
families, each with its positions: dusty and quiescent galaxies (:mod:`.contaminants`) and
cool dwarfs (:mod:`.dwarfs`). The families come last, so they leave the light cone's draws
unchanged.

Light-cone galaxies come from two published luminosity functions, each galaxy once:

- below z = 2, (z, M_K) from the rest-K function (Cirasuolo et al. 2010), with templates and
  M_UV from :mod:`.restk`;
- at z = 2-4, the quiescent galaxies of the rest-K function (:func:`.restk.quiescent_fraction`
  of it), all with the evolved template;
- at every z, (z, M_UV) from the rest-UV function, thinned below z = 2 by
  :func:`.restk.uv_excess_fraction` to the star-forming galaxies the rest-K function does not
  already hold (its faint end, where the rest-K fit is extrapolated); all star-forming: the
  rest-UV function counts UV-selected galaxies, and an evolved template normalised to a UV
  magnitude is a rest-optical galaxy ~5 mag brighter (M_UV - M_J ~ 5.3). Evolved templates on
  these galaxies above z = 4 (the former :func:`.seds.evolved_probability` draw) made
  ~0.8 quiescent galaxies per arcmin^2 at z = 4-5 brighter than AB 27 at 3.6 um, a comoving
  density of ~3e-4 Mpc^-3, ten times the published densities of quiescent galaxies at z ~ 4
  (:mod:`.contaminants`); quiescent galaxies beyond z = 4 are that family's.

Only galaxies whose apparent magnitude in the selection band could pass ``mag_limit`` are drawn:
for every redshift the brightest selection-band colour the star-forming template can have (its
parameters at their extreme deviates, which are clipped at 4 sigma; the band flux grows with
the optical slope and the break) gives the faintest M_UV that can still pass, with a 0.05 mag
margin; galaxies beyond that are never drawn, the rest are cut exactly on their synthetic
magnitude. With emission lines on, the star-forming envelope
carries the lines at their largest equivalent width (the +3 sigma clip of the draw).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from astropy.table import Table

from ..bands import Band
from ..config import PopulationConfig
from ..cosmo import default_cosmology
from ..errors import ConfigError, require
from . import seds
from ._photometry import Distances, Photometry
from ._table import GALAXY_DEFAULTS, POINT_DEFAULTS, galaxy_columns, stack_families
from .clustering import place_clustered
from .components import add_components
from .contaminants import draw_dusty, draw_quiescent
from .dwarfs import draw_dwarfs, dwarf_band_magnitudes
from .lines import LineParameters, draw_halpha_ew
from .luminosity import (draw_redshift_magnitude, expected_counts, nir_lf_parameters,
                         uv_lf_parameters)
from .morphology import Morphology, draw_morphology
from .restk import (NIR_LF_Z_MAX, QUIESCENT_Z_MAX, abs_mag_k_faint, faint_k_cut,
                    quiescent_fraction, uv_excess_fraction, uv_from_k)
from .seds import (BETA_SCATTER, SEDParameters, evolved_probability, rest_fnu_shape,
                   sed_parameters_from_deviates, uv_slope_relation)
from .stars import draw_stars, star_band_magnitudes

__all__ = ["make_population", "expected_galaxies", "selection_band_index", "COLUMN_UNITS"]

#: Units of the table columns (unit strings as astropy writes them).
COLUMN_UNITS = {
    "x_arcsec": "arcsec", "y_arcsec": "arcsec", "abs_mag_uv": "mag", "r_half": "arcsec",
    "r_half_kpc": "kpc", "position_angle": "deg", "teff": "K", "dust_av": "mag",
    "ew_halpha": "Angstrom", "ew_oiii_hbeta": "Angstrom", "ew_oii": "Angstrom",
}
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


class _Envelope:
    """Faintest colour (m_sel - m_1500) the star-forming template can have, on a redshift
    grid."""

    def __init__(self, phot: Photometry, z_min, z_max, mag_limit):
        self.z = np.linspace(z_min, z_max, max(60, int(np.ceil((z_max - z_min) / 0.05)) + 1))
        self.mag_limit = mag_limit
        nz, nb = self.z.size, _ENVELOPE_BETAS.size
        m_flat = phot.dist.dm(self.z) - 2.5 * np.log10(1.0 + self.z)
        # star-forming: every beta of the grid with beta_opt and break at their +4 sigma values
        zz = np.repeat(self.z, nb)
        bb = np.tile(_ENVELOPE_BETAS, nz)
        bo = seds.sf_beta_opt(bb) + 0.15 * 4.0
        br = np.full(zz.size, 10.0 ** (np.log10(seds.SF_BREAK) + 0.08 * 4.0))
        # lines at their largest equivalent width (the +3 sigma clip of draw_halpha_ew)
        ew = draw_halpha_ew(zz, phot.lines, np.full(zz.size, 3.0)) if phot.lines else None
        k_sf = phot.mags(zz, np.zeros(zz.size), bb, br, bo, True,
                         ew_halpha=ew)[:, 0].reshape(nz, nb)
        k_sf -= m_flat[:, None]
        # redder-or-equal betas could all occur: running minimum along beta
        self.k_sf = np.minimum.accumulate(k_sf, axis=1)
        self.m_flat = m_flat

    def _cell(self, z):
        i = np.clip(np.searchsorted(self.z, z), 1, self.z.size - 1)
        return i - 1, i

    def passes(self, z, m_uv):
        """Whether star-forming galaxies at (z, M_UV) could pass the limit."""
        z = np.asarray(z, dtype=float)
        a, b = self._cell(z)
        m_flat = np.interp(z, self.z, self.m_flat)
        beta_max = np.minimum(uv_slope_relation(z, m_uv) + 4.0 * BETA_SCATTER, 0.5)
        j = np.clip(np.searchsorted(_ENVELOPE_BETAS, beta_max), 0, _ENVELOPE_BETAS.size - 1)
        k_sf = np.minimum(self.k_sf[a, j], self.k_sf[b, j])
        return m_uv + m_flat + k_sf < self.mag_limit + _MARGIN_MAG


def line_parameters(pop: PopulationConfig):
    """The emission-line model of ``pop`` (:class:`.lines.LineParameters`), None if off."""
    if not pop.emission_lines:
        return None
    return LineParameters(ew_a=pop.ew_halpha_a, ew_slope=pop.ew_halpha_slope,
                          z_cap=pop.ew_halpha_z_cap, scatter_dex=pop.ew_scatter_dex,
                          ew_max=pop.ew_halpha_max, oiii_hbeta=pop.oiii_hbeta_ratio,
                          oii_hbeta=pop.oii_hbeta_ratio)


def _photometry(pop, bands, sel, cosmo):
    """Photometry over the redshifts of every family (the distance spline's range)."""
    z_lo = min(pop.z_min, pop.dusty_z_min, pop.quiescent_z_min)
    z_hi = max(pop.z_max, pop.dusty_z_max, pop.quiescent_z_max)
    return Photometry(bands, sel, Distances(z_lo, z_hi, cosmo), line_parameters(pop))


def _check_inputs(pop, bands, xi, eta):
    require(len(bands) > 0, "bands", list(bands), "must hold at least one band")
    for key, rng_ in (("field_xi_arcsec", xi), ("field_eta_arcsec", eta)):
        require(len(rng_) == 2 and rng_[1] > rng_[0], key, tuple(rng_),
                "must be (lo, hi) with hi > lo (arcsec)")


def _lf_weight(pop, phot):
    """(envelope, weight(z, M)): the fraction of galaxies at (z, M) that could pass the limit."""
    env = _Envelope(phot, pop.z_min, pop.z_max, pop.mag_limit)

    def weight(z, m):
        return env.passes(z, m) * uv_excess_fraction(z, m)

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
    phot = _photometry(pop, bands, selection_band_index(pop, bands), cosmo)
    n = 0.0
    for rng_z, w in ((_nir_range(pop), None), (_quiescent_range(pop), quiescent_fraction)):
        if rng_z:
            n += expected_counts(*rng_z, abs_mag_k_faint(pop.abs_mag_faint), area_arcsec2,
                                 mag_cut=_k_cut(pop, phot), cosmo=cosmo, lf=nir_lf_parameters,
                                 weight=w)
    _, weight = _lf_weight(pop, phot)
    n += expected_counts(*_uv_range(pop), pop.abs_mag_faint, area_arcsec2, cosmo=cosmo,
                         weight=weight)
    return n


def _nir_range(pop):
    """(z_lo, z_hi) drawn from the rest-K function, None if none of the range."""
    return (pop.z_min, min(pop.z_max, NIR_LF_Z_MAX)) if pop.z_min < NIR_LF_Z_MAX else None


def _quiescent_range(pop):
    """(z_lo, z_hi) of the quiescent rest-K draws, None if none of the range."""
    lo, hi = max(pop.z_min, NIR_LF_Z_MAX), min(pop.z_max, QUIESCENT_Z_MAX)
    return (lo, hi) if lo < hi else None


def _uv_range(pop):
    """(z_lo, z_hi) drawn from the rest-UV function: the whole range (thinned below
    :data:`.restk.NIR_LF_Z_MAX` by :func:`.restk.uv_excess_fraction`)."""
    return pop.z_min, pop.z_max


def _draw(pop, *args, budget=None, **kw):
    """draw_redshift_magnitude refusing more than ``budget`` (default ``max_sources``)."""
    try:
        return draw_redshift_magnitude(*args, max_expected=pop.max_sources if budget is None
                                       else budget, **kw)
    except OverflowError as exc:
        raise ConfigError("population.max_sources", pop.max_sources,
                          f"is too small: {exc}; raise it or lower population.mag_limit / "
                          "population.abs_mag_faint") from None


def _k_cut(pop, phot):
    return faint_k_cut(pop.mag_limit, pop.abs_mag_faint, phot.dist)


def _galaxies_from_nir_lf(pop, phot, area, rng, cosmo, z_lo, z_hi, quiescent_only=False,
                          budget=None):
    """Galaxies below :data:`.restk.NIR_LF_Z_MAX`: (z, M_K) from the rest-K function, the
    template (evolved with :func:`.restk.quiescent_fraction`), M_UV (:func:`.restk.uv_from_k`),
    then the exact cuts. ``quiescent_only``: the function thinned by the quiescent fraction,
    all evolved (z = 2-4)."""
    draw = _draw(pop, z_lo, z_hi, abs_mag_k_faint(pop.abs_mag_faint), area, rng,
                 mag_cut=_k_cut(pop, phot), cosmo=cosmo, lf=nir_lf_parameters,
                 weight=quiescent_fraction if quiescent_only else None, budget=budget)
    z = draw.redshift
    if quiescent_only:
        evolved = np.ones(z.size, bool)
    else:
        evolved = rng.random(z.size) < quiescent_fraction(z, draw.abs_mag)
    m, sed = uv_from_k(z, draw.abs_mag, evolved, rng.standard_normal((3, z.size)))
    ew = _halpha_ew(phot, z, evolved, rng)
    m_sel = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, True,
                      ew_halpha=ew)[:, 0]
    keep = (m <= pop.abs_mag_faint) & (m_sel < pop.mag_limit)
    return z[keep], m[keep], evolved[keep], _sed_subset(sed, keep), ew[keep], draw.expected


def _sed_subset(sed, keep):
    return SEDParameters(sed.template[keep], sed.beta[keep], sed.beta_opt[keep],
                         sed.break_strength[keep])


def _galaxies_from_lf(pop, phot, area, rng, cosmo):
    """Light-cone galaxies: rest-K draws below :data:`.restk.NIR_LF_Z_MAX`, then rest-UV draws
    (module docstring)."""
    parts = []
    if _nir_range(pop):
        parts.append(_galaxies_from_nir_lf(pop, phot, area, rng, cosmo, *_nir_range(pop)))
    # max_sources bounds the sum of the expectations
    if _quiescent_range(pop):
        budget = max(pop.max_sources - sum(p[5] for p in parts), 0.0)
        parts.append(_galaxies_from_nir_lf(pop, phot, area, rng, cosmo, *_quiescent_range(pop),
                                           quiescent_only=True, budget=budget))
    budget = max(pop.max_sources - sum(p[5] for p in parts), 0.0)
    parts.append(_galaxies_from_uv_lf(pop, phot, area, rng, cosmo, *_uv_range(pop), budget))
    z, m, evolved = (np.concatenate([p[i] for p in parts]) for i in range(3))
    sed = SEDParameters(*(np.concatenate([getattr(p[3], f) for p in parts])
                          for f in ("template", "beta", "beta_opt", "break_strength")))
    ew = np.concatenate([p[4] for p in parts])
    expected = sum(p[5] for p in parts)
    mags = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, ew_halpha=ew)
    return z, m, evolved, sed, np.ones(z.size, bool), mags, expected, ew


def _galaxies_from_uv_lf(pop, phot, area, rng, cosmo, z_lo, z_hi, budget):
    """Rest-UV galaxies: (z, M_UV) from the rest-UV function thinned by the envelope and
    :func:`.restk.uv_excess_fraction`, the star-forming template, then the exact cut."""
    env, weight = _lf_weight(pop, phot)
    draw = _draw(pop, z_lo, z_hi, pop.abs_mag_faint, area, rng, weight=weight, cosmo=cosmo,
                 budget=budget)
    z, m = draw.redshift, draw.abs_mag
    ok = env.passes(z, m)
    evolved = np.zeros(z.size, bool)
    sed = sed_parameters_from_deviates(z, m, evolved, rng.standard_normal((3, z.size)))
    ew = _halpha_ew(phot, z, evolved, rng)
    m_sel = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, True,
                      ew_halpha=ew)[:, 0]
    keep = ok & (m_sel < pop.mag_limit)
    return z[keep], m[keep], evolved[keep], _sed_subset(sed, keep), ew[keep], draw.expected


def _halpha_ew(phot, z, evolved, rng):
    """Rest EW(Halpha) (Angstrom) of the light cone's galaxies: 0 for evolved ones or when
    the line model is off (then nothing is drawn)."""
    if phot.lines is None:
        return np.zeros(z.size)
    return np.where(evolved, 0.0, draw_halpha_ew(z, phot.lines, rng.standard_normal(z.size)))


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
    by_abs = pop.uniform_in == "abs_mag"
    lo, hi = ((pop.uniform_abs_mag_min, pop.uniform_abs_mag_max) if by_abs
              else (pop.uniform_mag_min, pop.uniform_mag_max))
    mag = lo + (hi - lo) * rng.random(n)
    z = pop.z_min + (pop.z_max - pop.z_min) * rng.random(n)
    m = mag if by_abs else mag - phot.dist.dm(z) + 2.5 * np.log10(1.0 + z)
    evolved = rng.random(n) < evolved_probability(z, m, uv_lf_parameters(z).m_star)
    dev = rng.standard_normal((3, n))
    ew = _halpha_ew(phot, z, evolved, rng)
    # uniform in apparent magnitude: M_UV such that the selection-band magnitude is the drawn
    # one; beta depends weakly on M_UV (d beta / d M ~ -0.2), so a few fixed-point steps
    # converge to < 1e-4 mag
    for _ in range(0 if by_abs else 4):
        sed = sed_parameters_from_deviates(z, m, evolved, dev)
        m_sel = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, True,
                          ew_halpha=ew)[:, 0]
        m = m + (mag - m_sel)
    sed = sed_parameters_from_deviates(z, m, evolved, dev)
    mags = phot.mags(z, m, sed.beta, sed.break_strength, sed.beta_opt, ew_halpha=ew)
    keep = np.ones(n, dtype=bool)
    return z, m, evolved, sed, keep, mags, expected, ew


def make_population(pop: PopulationConfig, bands: list[Band], field_xi_arcsec: tuple,
                    field_eta_arcsec: tuple, rng: np.random.Generator, cosmo=None) -> Table:
    """All sources of a field as an astropy Table: light-cone galaxies, stars, then the
    contaminant families (dusty and quiescent galaxies, cool dwarfs).

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
        Columns: id (1..N), kind (galaxy/star/dusty/quiescent/dwarf), x_arcsec, y_arcsec
        (xi, eta; arcsec), redshift, abs_mag_uv (AB, rest 1500 A, before dust; NaN for
        stars), mag_<band> (intrinsic AB), r_half (arcsec), r_half_kpc, sersic_n, axis_ratio,
        position_angle (deg east of north), beta_uv, beta_opt, break_strength, template
        (starforming/evolved/star/dusty/quiescent/dwarf), knot_fraction, n_knots, knot_seed,
        teff (K; stars and dwarfs), spectral_type (dwarfs: M0 = 10, L0 = 20, T0 = 30), dust_av
        (mag), ew_halpha, ew_oiii_hbeta, ew_oii (rest EWs, Angstrom; NaN for point sources).
    """
    _check_inputs(pop, bands, field_xi_arcsec, field_eta_arcsec)
    cosmo = cosmo or default_cosmology()
    sel = selection_band_index(pop, bands)
    (x0, x1), (y0, y1) = field_xi_arcsec, field_eta_arcsec
    area = (x1 - x0) * (y1 - y0)
    phot = _photometry(pop, bands, sel, cosmo)
    if pop.mode == "uniform":
        z, m, evolved, sed, keep, mags, expected, ew = _galaxies_uniform(pop, phot, area, rng,
                                                                         cosmo, bands)
    else:
        z, m, evolved, sed, keep, mags, expected, ew = _galaxies_from_lf(pop, phot, area, rng,
                                                                         cosmo)
    shape = rest_fnu_shape(550.0, sed.beta[keep], sed.break_strength[keep], sed.beta_opt[keep])
    morph: Morphology = draw_morphology(z, m, evolved, rng, clumpy=pop.clumpy,
                                        abs_mag_opt=m - 2.5 * np.log10(shape),
                                        d_a_mpc=phot.dist.d_a(z))
    stars = draw_stars(pop.star_density_arcmin2, pop.star_mag_min, pop.star_mag_max, area, rng,
                       slope_dex=pop.star_count_slope)
    ns = stars.mag.size
    star_mags = star_band_magnitudes(stars.mag, stars.teff, bands, sel) if ns else \
        np.zeros((0, len(bands)))
    n = z.size + ns
    x = x0 + (x1 - x0) * rng.random(n)
    y = y0 + (y1 - y0) * rng.random(n)
    families = [
        ("galaxy", np.where(evolved, "evolved", "starforming"), z.size, mags,
         galaxy_columns(phot, z, m, sed.beta[keep], sed.beta_opt[keep],
                        sed.break_strength[keep], morph, ew), GALAXY_DEFAULTS),
        ("star", "star", ns, star_mags, {"teff": stars.teff}, POINT_DEFAULTS),
    ]
    # contaminant families, drawn after the light cone and the stars (whose draws they leave
    # unchanged), each followed by its positions
    xs, ys = [x], [y]
    for kind, fam in (("dusty", draw_dusty(pop, phot, area, rng, phot.lines)),
                      ("quiescent", draw_quiescent(pop, phot, area, rng))):
        families.append((kind, kind, fam.z.size, fam.mags,
                         galaxy_columns(phot, fam.z, fam.abs_mag_uv, fam.beta, fam.beta_opt,
                                        fam.break_strength, fam.morph, fam.ew_halpha,
                                        fam.dust_av), GALAXY_DEFAULTS))
        xs.append(x0 + (x1 - x0) * rng.random(fam.z.size))
        ys.append(y0 + (y1 - y0) * rng.random(fam.z.size))
    dw = draw_dwarfs(pop.dwarf_density_arcmin2, pop.dwarf_mag_min, pop.dwarf_mag_max,
                     pop.dwarf_count_slope, pop.dwarf_type_fractions, area, rng)
    nd = dw.mag.size
    families.append(("dwarf", "dwarf", nd,
                     dwarf_band_magnitudes(dw.mag, dw.spectral_type, bands) if nd else
                     np.zeros((0, len(bands))),
                     {"teff": dw.teff, "spectral_type": dw.spectral_type}, POINT_DEFAULTS))
    xs.append(x0 + (x1 - x0) * rng.random(nd))
    ys.append(y0 + (y1 - y0) * rng.random(nd))
    t = stack_families(families, bands, np.concatenate(xs), np.concatenate(ys))
    # bulges and disks, then clustered positions: drawn last, so the draws above stay as they were
    add_components(t, phot, bands, pop.bulge_mag_max)
    if pop.placement == "clustered":
        place_clustered(t, bands[sel].name, (x0, x1), (y0, y1), rng)
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
        "placement": pop.placement,
    })
    return t
