"""Galaxy families that contaminate high-redshift samples: dusty and quiescent galaxies.

Both are drawn like the foreground stars, as a Poisson number per arcmin^2 between a bright and
a faint apparent magnitude in the selection band, with differential counts
dN/dm ~ 10^(0.25 m) (deep near-infrared counts rise 0.2-0.3 dex/mag, see REFERENCES [mem]);
the rest-UV magnitude M_UV then follows from the synthetic magnitude of the spectrum.

Dusty star-forming galaxies (``kind`` "dusty"), z ~ 1-4: the star-forming template of
:mod:`.seds` (its beta, beta_opt and break at M_UV = -21) with nebular lines (:mod:`.lines`),
dimmed by the Calzetti et al. 2000 curve (:mod:`.dust`); A_V log-normal about
``dusty_av_median`` (~2 mag for submillimetre galaxies, da Cunha et al. 2015, ApJ 806, 110
[mem]) with ``dusty_av_sigma_dex``, clipped to [0.3, 6] mag; redshifts from a normal
distribution of mean 2.5 and sigma 0.8 truncated to the configured range (the redshift
distribution of submillimetre galaxies peaks at z ~ 2.2-2.6, Chapman et al. 2005, ApJ 622, 772;
Dudzeviciute et al. 2020, MNRAS 494, 3828 [mem]). Shapes: the star-forming size relation of
:mod:`.morphology`, no knots.

Quiescent galaxies with strong Balmer breaks (``kind`` "quiescent"), by default at z = 4-6,
beyond the light cone's own quiescent galaxies (drawn from the rest-K function up to z = 4,
:mod:`.lightcone`; the rest-UV function's galaxies are all star-forming), at the density of
``conf/population/evolving_lf.yaml`` (published number densities at z ~ 4 [mem]): the "evolved"
template shape with a stronger break, N(``quiescent_break``, 0.2) clipped to [1.8, 3.5] (flux
ratio across the break of post-starburst and quiescent galaxies at z > 3 ~ 2-3, e.g. Carnall
et al. 2023, Nature 619, 716 [mem]); redshifts with p(z) ~ exp(-(z - z_min) / 0.8) (the number
density of massive quiescent galaxies falls by ~10x from z ~ 2.5 to ~3.7, Muzzin et al. 2013,
ApJ 777, 18; Straatman et al. 2014, ApJ 783, L14 [mem]; the same e-folding is kept beyond
z = 4, with the volume element nearly flat there); sizes from the quiescent relation of
:mod:`.sizes` (van der Wel et al. 2014; ~0.5 kpc at M* = 5e10 Msun and z = 4, compact like the
~0.5-1 kpc of Straatman et al. 2015, ApJ 808, L29 and Esdaile et al. 2021, ApJ 908, L35
[mem]), Sersic n ~ 3.5; no lines, no dust.

Units: magnitudes AB, A_V mag, sizes arcsec (and kpc), densities per arcmin^2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr, ndtri

from ..config import PopulationConfig
from .lines import draw_halpha_ew
from .morphology import Morphology, draw_morphology, sersic_index
from .seds import rest_fnu_shape, sed_parameters_from_deviates
from .sizes import draw_r_half_kpc
from .stars import draw_star_magnitudes

__all__ = ["GALAXY_COUNT_SLOPE", "GalaxyFamily", "draw_dusty", "draw_quiescent"]

#: Slope of the differential counts of both families (dex/mag).
GALAXY_COUNT_SLOPE = 0.25
_DUSTY_Z_MEAN, _DUSTY_Z_SIGMA = 2.5, 0.8
_QUIESCENT_Z_SCALE = 0.8
_RAD_TO_ARCSEC = 180.0 / np.pi * 3600.0


@dataclass(frozen=True)
class GalaxyFamily:
    """Drawn galaxies of one family (arrays of length n).

    Attributes
    ----------
    z : ndarray
    abs_mag_uv : ndarray (AB mag)
        Rest-150 nm absolute magnitude before dust.
    beta, beta_opt, break_strength : ndarray
        Template parameters (:mod:`.seds`).
    dust_av : ndarray (mag)
    ew_halpha : ndarray (Angstrom)
        Rest EW(Halpha), 0 without lines.
    mags : ndarray (AB mag), shape (n, n_band)
    morph : Morphology
    """

    z: np.ndarray
    abs_mag_uv: np.ndarray
    beta: np.ndarray
    beta_opt: np.ndarray
    break_strength: np.ndarray
    dust_av: np.ndarray
    ew_halpha: np.ndarray
    mags: np.ndarray
    morph: Morphology


def _count_and_mags(density, mag_min, mag_max, area, rng):
    n = int(rng.poisson(density * area / 3600.0))
    return n, draw_star_magnitudes(n, mag_min, mag_max, GALAXY_COUNT_SLOPE, rng)


def _normalise(phot, z, m_sel, sed, av, ew):
    """M_UV giving selection-band magnitude ``m_sel`` (fluxes scale with 10^(-0.4 M_UV)),
    and all band magnitudes."""
    zero = np.zeros(z.size)
    k = phot.mags(z, zero, sed.beta, sed.break_strength, sed.beta_opt, True, av, ew)[:, 0]
    m_uv = m_sel - k
    mags = phot.mags(z, m_uv, sed.beta, sed.break_strength, sed.beta_opt, False, av, ew)
    return m_uv, mags


def draw_dusty(pop: PopulationConfig, phot, area_arcsec2: float, rng: np.random.Generator,
               line_par) -> GalaxyFamily:
    """Dusty star-forming galaxies (module docstring).

    Parameters
    ----------
    pop : PopulationConfig
    phot : Photometry (of :mod:`._photometry`)
    area_arcsec2 : float (arcsec^2)
    rng : numpy.random.Generator
    line_par : LineParameters or None
    """
    n, m_sel = _count_and_mags(pop.dusty_density_arcmin2, pop.dusty_mag_min, pop.dusty_mag_max,
                               area_arcsec2, rng)
    # truncated normal by inverse CDF: u uniform between Phi(a) and Phi(b)
    a, b = (ndtr((v - _DUSTY_Z_MEAN) / _DUSTY_Z_SIGMA) for v in (pop.dusty_z_min,
                                                                 pop.dusty_z_max))
    z = _DUSTY_Z_MEAN + _DUSTY_Z_SIGMA * ndtri(a + (b - a) * rng.random(n))
    g = rng.standard_normal((5, n))
    av = np.clip(pop.dusty_av_median * 10.0 ** (pop.dusty_av_sigma_dex * g[3]), 0.3, 6.0)
    sed = sed_parameters_from_deviates(z, np.full(n, -21.0), np.zeros(n, bool), g[:3])
    ew = draw_halpha_ew(z, line_par, g[4]) if line_par is not None else np.zeros(n)
    m_uv, mags = _normalise(phot, z, m_sel, sed, av, ew)
    morph = draw_morphology(z, m_uv, np.zeros(n, bool), rng, clumpy=False,
                            d_a_mpc=phot.dist.d_a(z))
    return GalaxyFamily(z, m_uv, sed.beta, sed.beta_opt, sed.break_strength, av, ew, mags,
                        morph)


def draw_quiescent(pop: PopulationConfig, phot, area_arcsec2: float,
                   rng: np.random.Generator) -> GalaxyFamily:
    """Quiescent galaxies with strong Balmer breaks (module docstring); arguments as
    :func:`draw_dusty`."""
    n, m_sel = _count_and_mags(pop.quiescent_density_arcmin2, pop.quiescent_mag_min,
                               pop.quiescent_mag_max, area_arcsec2, rng)
    # exponential in z truncated to [z_min, z_max] by inverse CDF
    span = 1.0 - np.exp(-(pop.quiescent_z_max - pop.quiescent_z_min) / _QUIESCENT_Z_SCALE)
    z = pop.quiescent_z_min - _QUIESCENT_Z_SCALE * np.log1p(-span * rng.random(n))
    g = np.clip(rng.standard_normal((6, n)), -4.0, 4.0)
    sed = sed_parameters_from_deviates(z, np.full(n, -21.0), np.ones(n, bool), g[:3])
    brk = np.clip(pop.quiescent_break + 0.2 * g[2], 1.8, 3.5)
    sed = type(sed)(sed.template, sed.beta, sed.beta_opt, brk)
    m_uv, mags = _normalise(phot, z, m_sel, sed, None, None)
    m_opt = m_uv - 2.5 * np.log10(rest_fnu_shape(550.0, sed.beta, brk, sed.beta_opt))
    r_kpc = draw_r_half_kpc(z, m_uv, np.ones(n, bool), g[3], m_opt)  # van der Wel et al. 2014
    r_arcsec = r_kpc / (phot.dist.d_a(z) * 1e3) * _RAD_TO_ARCSEC
    u = rng.random(n)
    zeros = np.zeros(n)
    morph = Morphology(r_half=r_arcsec, r_half_kpc=r_kpc,
                       sersic_n=sersic_index(np.ones(n, bool), g[4]),
                       axis_ratio=np.clip(0.75 + 0.15 * g[5], 0.3, 1.0),
                       position_angle=180.0 * u, knot_fraction=zeros,
                       n_knots=zeros.astype(int), knot_seed=rng.integers(1, 2**31 - 1, size=n))
    return GalaxyFamily(z, m_uv, sed.beta, sed.beta_opt, brk, zeros, zeros, mags, morph)
