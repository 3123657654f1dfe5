"""Evolving rest-UV and rest-K Schechter luminosity functions; light-cone sampling of (z, M).

The luminosity function in absolute AB magnitude (Schechter 1976, ApJ 203, 297):

    phi(M) dM = 0.4 ln10 phi* 10^(-0.4 (M - M*)(alpha + 1)) exp(-10^(-0.4 (M - M*))) dM

in Mpc^-3 mag^-1. With x = L/L* = 10^(-0.4 (M - M*)), the number density brighter than M is
phi* Gamma(alpha + 1, x), the upper incomplete gamma function (negative first argument allowed,
see :func:`upper_incomplete_gamma`).

Rest-UV (1500 A) parameters versus redshift (:func:`uv_lf_parameters`):

- z >= 4.5: the evolution fit of Bouwens et al. 2015, ApJ 803, 34 (section 5.1):
  M* = -20.95 + 0.01 (z - 6), phi* = 0.47e-3 10^(-0.27 (z - 6)) Mpc^-3,
  alpha = -1.87 - 0.10 (z - 6).
- z < 4.5: linear interpolation in z of M*, log10 phi* and alpha between published fits
  (:data:`LOW_Z_NODES`, values recalled [mem]) and the Bouwens et al. fit evaluated at z = 4.5;
  held constant below the lowest node. At z ~ 2-4 the published faint-end slopes disagree:
  alpha ~ -1.7 at z ~ 2-3 (Reddy & Steidel 2009, ApJ 692, 778; Alavi et al. 2016, ApJ 832, 56
  [mem]) and -1.64 at z ~ 4 (Bouwens et al. 2015) against alpha = -1.32 +- 0.03 at z ~ 2-3
  and -1.43 +- 0.04 at z ~ 4 (Parsa et al. 2016, MNRAS 456, 3194, abstract). The nodes at
  z = 2.0, 2.8 and 3.8 take Parsa et al.'s fits: one analysis across z = 2-4 (photometric
  redshifts over nested ultra-deep, deep and wide fields), reaching M_1500 = -14.5 to -16,
  3-4 mag fainter than the colour-selected samples of the steeper fits.

Rest-K (2.2 um) parameters (:func:`nir_lf_parameters`), used by the light cone below z = 2,
where the near-infrared bands see rest-optical light and red, quiescent galaxies missing from
a UV-selected function dominate the bright end: the evolution fit of Cirasuolo et al. 2010,
MNRAS 401, 1166 (maximum likelihood over 0 < z < 4, AB, H0 = 70) [mem]:

    M*_K(z) = -22.26 - (z / 1.78)^0.47,  phi*(z) = 3.5e-3 exp(-(z / 1.70)^1.47) Mpc^-3,
    alpha = -1.07 (fixed at the local value).

Typed from memory, it reproduces the binned 1/Vmax densities of their Fig. 8 (read in a stored
copy, ICRAR/shark data/lf/lfKz_cirasuolo10.data) at z = 0.5-2 within 0.11 dex (rms 0.05) in
every bin measured to 0.03 dex brighter than M_AB = -19.3 (tests/test_population.py).

Its faint end is an extrapolation beyond the data at z > 0.5 (deeper data give alpha ~ -1.3
to -1.5, Mortlock et al. 2017, MNRAS 465, 672); the light cone takes the faint star-forming
galaxies from the rest-UV function there (see :mod:`.lightcone`).

Distances and volumes come from :mod:`simfield.cosmo` (flat LambdaCDM, H0 = 70, Omega_m = 0.3,
the cosmology of the fits). Magnitudes in AB mag, densities in Mpc^-3, solid angles in arcsec^2.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Optional

import numpy as np
from scipy import special

from ..cosmo import comoving_volume_element

__all__ = [
    "LOW_Z_NODES",
    "HIGH_Z_START",
    "SchechterParameters",
    "uv_lf_parameters",
    "nir_lf_parameters",
    "schechter_phi",
    "upper_incomplete_gamma",
    "schechter_number_brighter",
    "uv_luminosity_function",
    "number_density_brighter",
    "LightConeDraw",
    "expected_counts",
    "draw_redshift_magnitude",
]

#: (z, M*, phi* [Mpc^-3], alpha) of published rest-UV Schechter fits used below z = 4.5 [mem]:
#: z = 0.055 Wyder et al. 2005, ApJ 619, L15 (1530 A, local); z = 1.0 a rounded compromise of
#: Arnouts et al. 2005, ApJ 619, L43 and Oesch et al. 2010, ApJ 725, L150 [mem, approximate];
#: z = 2.0, 2.8 and 3.8 Parsa et al. 2016, MNRAS 456, 3194 (alpha -1.32, -1.32, -1.43 from
#: the abstract; M*, phi* [mem]).
LOW_Z_NODES = (
    (0.055, -18.04, 4.07e-3, -1.22),
    (1.0, -19.60, 3.0e-3, -1.50),
    (2.0, -19.99, 6.2e-3, -1.32),
    (2.8, -20.20, 4.3e-3, -1.32),
    (3.8, -20.71, 2.3e-3, -1.43),
)
#: Redshift from which the Bouwens et al. 2015 evolution fit is used as published.
HIGH_Z_START = 4.5

_NIR_ALPHA = -1.07  # Cirasuolo et al. 2010 (fixed over z in their fit) [mem]
_LN10_04 = 0.4 * np.log(10.0)  # dM -> dL/L: |d ln L / dM| = 0.4 ln 10


@dataclass(frozen=True)
class SchechterParameters:
    """Schechter parameters, scalars or arrays broadcast together.

    Attributes
    ----------
    m_star : float or ndarray (AB mag)
        Characteristic absolute magnitude M*.
    phi_star : float or ndarray (Mpc^-3)
        Normalisation phi*.
    alpha : float or ndarray
        Faint-end slope.
    """

    m_star: np.ndarray
    phi_star: np.ndarray
    alpha: np.ndarray


def _bouwens2015(z):
    dz = np.asarray(z, dtype=float) - 6.0
    return -20.95 + 0.01 * dz, 0.47e-3 * 10.0 ** (-0.27 * dz), -1.87 - 0.10 * dz


def uv_lf_parameters(z) -> SchechterParameters:
    """Rest-UV Schechter parameters at redshift ``z`` (see the module docstring).

    Parameters
    ----------
    z : float or array_like
        Redshift (> 0).

    Returns
    -------
    SchechterParameters
        M* (AB mag), phi* (Mpc^-3), alpha, each with the shape of ``z``.
    """
    z = np.asarray(z, dtype=float)
    ms_hi, ps_hi, al_hi = _bouwens2015(z)
    ms0, ps0, al0 = _bouwens2015(HIGH_Z_START)
    nodes = np.array(LOW_Z_NODES + ((HIGH_Z_START, float(ms0), float(ps0), float(al0)),))
    zn = nodes[:, 0]
    ms_lo = np.interp(z, zn, nodes[:, 1])
    lps_lo = np.interp(z, zn, np.log10(nodes[:, 2]))
    al_lo = np.interp(z, zn, nodes[:, 3])
    hi = z >= HIGH_Z_START
    return SchechterParameters(
        m_star=np.where(hi, ms_hi, ms_lo),
        phi_star=np.where(hi, ps_hi, 10.0**lps_lo),
        alpha=np.where(hi, al_hi, al_lo),
    )


def nir_lf_parameters(z) -> SchechterParameters:
    """Rest-frame K-band (2.2 um) Schechter parameters at redshift ``z``: the evolution fit of
    Cirasuolo et al. 2010, MNRAS 401, 1166 [mem] (module docstring).

    Parameters
    ----------
    z : float or array_like
        Redshift (>= 0).

    Returns
    -------
    SchechterParameters
        M*_K (AB mag), phi* (Mpc^-3), alpha, each with the shape of ``z``.
    """
    z = np.maximum(np.asarray(z, dtype=float), 0.0)
    return SchechterParameters(m_star=-22.26 - (z / 1.78) ** 0.47,
                               phi_star=3.5e-3 * np.exp(-((z / 1.70) ** 1.47)),
                               alpha=np.full(z.shape, _NIR_ALPHA))


def schechter_phi(abs_mag, m_star, phi_star, alpha):
    """Schechter function in magnitudes, phi(M) (Mpc^-3 mag^-1).

    Parameters
    ----------
    abs_mag : float or array_like (AB mag)
        Absolute magnitude M.
    m_star : float or array_like (AB mag)
    phi_star : float or array_like (Mpc^-3)
    alpha : float or array_like
    """
    x = 10.0 ** (-0.4 * (np.asarray(abs_mag, dtype=float) - m_star))
    return _LN10_04 * phi_star * x ** (np.asarray(alpha) + 1.0) * np.exp(-x)


def upper_incomplete_gamma(s, x):
    """Upper incomplete gamma function Gamma(s, x) = int_x^inf t^(s-1) e^-t dt for any real s.

    For s > 0 it is Gamma(s) Q(s, x) (``scipy.special.gammaincc``); Gamma(0, x) = E1(x)
    (``scipy.special.exp1``); for s < 0 the recurrence Gamma(s, x) = (Gamma(s+1, x) - x^s e^-x)/s
    (Abramowitz & Stegun 1964, eq. 6.5.22) is applied until the first argument is >= 0.

    Parameters
    ----------
    s : float or array_like
        First argument; values within 1e-8 of an integer are rounded to it.
    x : float or array_like
        Second argument (> 0).
    """
    # functions of s alone are evaluated on s's own shape, before broadcasting against x
    s = np.asarray(s, dtype=float)
    x = np.asarray(x, dtype=float)
    # within 1e-8 of an integer, use the integer: the recurrence would divide by ~0 (the
    # relative change of Gamma(s, x) over 1e-8 in s is ~1e-8 |ln x|)
    s = np.where(np.abs(s - np.round(s)) < 1e-8, np.round(s), s)
    n_steps = np.where(s < 0, np.ceil(-s), 0.0)
    base = s + n_steps  # in [0, 1)
    near0 = base == 0.0
    safe = np.where(near0, 1.0, base)
    out = special.gamma(safe) * special.gammaincc(safe, x)
    if np.any(near0):
        out = np.where(near0, special.exp1(x), out)
    n_max = int(n_steps.max()) if n_steps.size else 0
    if n_max:
        ln_x, e_x = np.log(x), np.exp(-x)
        # walk down from base to s: Gamma(a-1, x) = (Gamma(a, x) - x^(a-1) e^-x) / (a-1)
        a = base
        for _ in range(n_max):
            step = n_steps > 0
            am1 = np.where(step, a - 1.0, a)
            new = (out - np.exp(am1 * ln_x) * e_x) / np.where(step, am1, 1.0)
            out = np.where(step, new, out)
            a = am1
            n_steps = n_steps - step
    return out


def schechter_number_brighter(abs_mag, m_star, phi_star, alpha):
    """Number density brighter than ``abs_mag``: phi* Gamma(alpha + 1, L/L*) (Mpc^-3).

    Parameters
    ----------
    abs_mag : float or array_like (AB mag)
    m_star : float or array_like (AB mag)
    phi_star : float or array_like (Mpc^-3)
    alpha : float or array_like
    """
    x = 10.0 ** (-0.4 * (np.asarray(abs_mag, dtype=float) - m_star))
    return phi_star * upper_incomplete_gamma(np.asarray(alpha) + 1.0, x)


def uv_luminosity_function(abs_mag, z):
    """Rest-UV luminosity function phi(M_UV, z) (Mpc^-3 mag^-1); arguments broadcast."""
    p = uv_lf_parameters(z)
    return schechter_phi(abs_mag, p.m_star, p.phi_star, p.alpha)


def number_density_brighter(abs_mag, z):
    """Comoving number density of galaxies brighter than ``abs_mag`` at ``z`` (Mpc^-3)."""
    p = uv_lf_parameters(z)
    return schechter_number_brighter(abs_mag, p.m_star, p.phi_star, p.alpha)


# --------------------------------------------------------------------------------------------
# light cone
# --------------------------------------------------------------------------------------------
#: Brightest magnitude drawn, relative to M*: exp(-10^(0.4*7)) = exp(-631) is nil.
_BRIGHT_OFFSET = 7.0


@dataclass(frozen=True)
class LightConeDraw:
    """Galaxies drawn from the luminosity function on a light cone.

    Attributes
    ----------
    redshift : ndarray
    abs_mag : ndarray (AB mag)
        Rest-1500 A absolute magnitude.
    expected : float
        Expected number of galaxies in the drawn region of (z, M).
    """

    redshift: np.ndarray
    abs_mag: np.ndarray
    expected: float


def _grid(z_min, z_max, abs_mag_faint, area_arcsec2, mag_cut, cosmo, nz, dmag, weight=None,
          lf=uv_lf_parameters):
    # cells uniform in ln(1 + z): narrow at low z where dV/dz changes fastest
    z_edges = np.expm1(np.linspace(np.log1p(z_min), np.log1p(z_max), nz + 1))
    z_mid = 0.5 * (z_edges[1:] + z_edges[:-1])
    p = lf(z_mid)
    m_faint = np.full(nz, float(abs_mag_faint))
    if mag_cut is not None:
        # most permissive cut over each cell (the cut need not be monotonic in z)
        cut = np.maximum(mag_cut(z_edges[1:]), mag_cut(z_edges[:-1]))
        m_faint = np.minimum(m_faint, cut)
    m_bright = p.m_star - _BRIGHT_OFFSET
    m_lo = float(np.min(m_bright))
    n_m = max(2, int(np.ceil((abs_mag_faint - m_lo) / dmag)) + 1)
    m_nodes = np.linspace(m_lo, abs_mag_faint, n_m)
    # per z cell, the cumulative density brighter than each node, clipped to the cell's range
    mm = np.clip(m_nodes[None, :], m_bright[:, None], np.maximum(m_faint, m_bright)[:, None])
    cum = schechter_number_brighter(mm, p.m_star[:, None], p.phi_star[:, None],
                                    p.alpha[:, None])
    cum -= cum[:, :1]
    if weight is not None:
        zz, mm_mid = np.broadcast_arrays(z_mid[:, None], 0.5 * (m_nodes[1:] + m_nodes[:-1]))
        inc = np.diff(cum, axis=1) * np.clip(weight(zz, mm_mid), 0.0, 1.0)
        cum = np.concatenate([np.zeros((nz, 1)), np.cumsum(inc, axis=1)], axis=1)
    dvol = comoving_volume_element(z_mid, cosmo) * area_arcsec2 * np.diff(z_edges)  # Mpc^3
    return z_edges, m_nodes, cum, dvol


def expected_counts(z_min: float, z_max: float, abs_mag_faint: float, area_arcsec2: float,
                    mag_cut: Optional[Callable] = None, cosmo=None, nz: int = 300,
                    dmag: float = 0.04, weight: Optional[Callable] = None,
                    lf: Callable = uv_lf_parameters) -> float:
    """Expected number of galaxies, int dz dV/dz/dOmega Omega int dM phi(M, z).

    Parameters
    ----------
    z_min, z_max : float
        Redshift range.
    abs_mag_faint : float (AB mag)
        Faintest absolute magnitude.
    area_arcsec2 : float (arcsec^2)
        Solid angle of the field.
    mag_cut : callable, optional
        ``mag_cut(z) -> M`` (AB mag): also no galaxy fainter than this at z.
    cosmo : astropy cosmology, optional
    nz : int
        Redshift cells, uniform in ln(1 + z) (midpoint rule in z, analytic in M).
    dmag : float (mag)
        Spacing of the magnitude nodes.
    weight : callable, optional
        ``weight(z, M) -> [0, 1]``: fraction of the galaxies at (z, M) to count (evaluated at
        cell centres, e.g. the fraction whose apparent magnitude could pass a limit).
    lf : callable
        ``lf(z) -> SchechterParameters`` of the magnitudes counted (default the rest-UV
        function, :func:`uv_lf_parameters`; :func:`nir_lf_parameters` for rest-K).
    """
    _, _, cum, dvol = _grid(z_min, z_max, abs_mag_faint, area_arcsec2, mag_cut, cosmo, nz, dmag,
                            weight, lf)
    return float(np.sum(cum[:, -1] * dvol))


def draw_redshift_magnitude(z_min: float, z_max: float, abs_mag_faint: float,
                            area_arcsec2: float, rng: np.random.Generator,
                            mag_cut: Optional[Callable] = None, cosmo=None, nz: int = 300,
                            dmag: float = 0.04, weight: Optional[Callable] = None,
                            max_expected: float = np.inf,
                            lf: Callable = uv_lf_parameters) -> LightConeDraw:
    """Draw (z, M_UV) of the galaxies of a light cone.

    The total is Poisson with the mean of :func:`expected_counts`. Each galaxy's redshift cell
    is drawn with probability proportional to its expected count and z is uniform in the cell;
    M is then drawn by inverting that cell's cumulative number density (analytic at nodes
    ``dmag`` apart, linear between them).

    Parameters
    ----------
    z_min, z_max : float
        Redshift range.
    abs_mag_faint : float (AB mag)
        Faintest absolute magnitude drawn.
    area_arcsec2 : float (arcsec^2)
        Solid angle of the field.
    rng : numpy.random.Generator
    mag_cut : callable, optional
        ``mag_cut(z) -> M`` (AB mag): only galaxies brighter than this are drawn (e.g. those
        whose apparent magnitude could pass a limit).
    cosmo : astropy cosmology, optional
    nz : int
        Redshift cells, uniform in ln(1 + z).
    dmag : float (mag)
        Spacing of the magnitude nodes.
    weight : callable, optional
        ``weight(z, M) -> [0, 1]``: thinning of the density, evaluated at the centres of the
        (z, M) cells (with ``weight`` the M density is linear within a cell only up to the
        variation of ``weight``).
    max_expected : float
        Raise ``OverflowError`` (before drawing) if more galaxies than this are expected.
    lf : callable
        ``lf(z) -> SchechterParameters`` (as in :func:`expected_counts`); the drawn magnitudes
        are in its band.
    """
    z_edges, m_nodes, cum, dvol = _grid(z_min, z_max, abs_mag_faint, area_arcsec2, mag_cut,
                                        cosmo, nz, dmag, weight, lf)
    cell_n = cum[:, -1] * dvol
    expected = float(cell_n.sum())
    if expected > max_expected:
        raise OverflowError(f"{expected:.0f} galaxies expected, more than {max_expected:.0f}")
    n = int(rng.poisson(expected))
    if n == 0 or expected <= 0:
        return LightConeDraw(np.zeros(0), np.zeros(0), expected)
    cdf_z = np.cumsum(cell_n) / expected
    k = np.minimum(np.searchsorted(cdf_z, rng.random(n), side="right"), len(cell_n) - 1)
    z = z_edges[k] + rng.random(n) * (z_edges[k + 1] - z_edges[k])
    # inverse CDF in M per cell: rows normalised to [0, 1] and offset by the row index make one
    # increasing array, so a single searchsorted serves every galaxy
    tot = cum[:, -1:]
    norm = np.divide(cum, tot, out=np.zeros_like(cum), where=tot > 0)
    n_m = m_nodes.size
    flat = (norm + np.arange(len(cell_n))[:, None]).ravel()
    target = k + np.clip(rng.random(n), 1e-12, 1 - 1e-12)
    j = np.clip(np.searchsorted(flat, target, side="left"), 1, flat.size - 1)
    lo, hi = flat[j - 1], flat[j]
    frac = np.where(hi > lo, (target - lo) / np.where(hi > lo, hi - lo, 1.0), 0.0)
    col = j % n_m
    col = np.where(col == 0, 1, col)
    m = m_nodes[col - 1] + frac * (m_nodes[col] - m_nodes[col - 1])
    return LightConeDraw(z, m, expected)
