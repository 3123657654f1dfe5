"""Galaxy shapes: Sersic index, size-luminosity-redshift relation, axis ratio, knots.

Sizes: :mod:`.sizes` (Shibuya et al. 2015 for star-forming, van der Wel et al. 2014 for
quiescent galaxies, with their scatter). Sersic index: median n ~ 1.5 for star-forming (Shibuya
et al. 2015 [from memory]) and ~3.5 for evolved galaxies. Sizes are converted to arcsec with the
angular-diameter distance.

Clumps: a fraction of the larger star-forming galaxies (r_e > 1 kpc, 60 %; clumpy fraction of
star-forming galaxies at z ~ 1-3 ~ 0.6, Guo et al. 2015, ApJ 800, 39 [mem]) put 5-30 % of their
light in 3-15 knots (``galsim.RandomKnots``, positions seeded per galaxy by ``knot_seed``).

Profiles are returned in tangent-plane coordinates: x = xi (east), y = eta (north), arcsec.
Position angles are measured from north through east, so GalSim's angle (from +x toward +y)
is 90 deg - PA.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Optional

import galsim
import numpy as np

from ..columns import POINT_KINDS
from ..cosmo import angular_diameter_distance
from .sizes import draw_r_half_kpc, median_r_half_kpc

__all__ = [
    "SERSIC_N_RANGE",
    "TRUNCATION_RADII",
    "Morphology",
    "sersic_index",
    "half_light_radius_kpc",
    "draw_morphology",
    "make_profile",
    "make_components",
    "two_component",
]

#: Sersic indices GalSim supports.
SERSIC_N_RANGE = (0.3, 6.2)
#: Sersic profiles are truncated at this many half-light radii; the given half-light radius and
#: unit flux refer to the truncated profile (``flux_untruncated=False``).
TRUNCATION_RADII = 5.0
_KNOT_SIZE_FRACTION = 0.12  # Gaussian FWHM of one knot / half-light radius
_MIN_KNOT_FWHM_ARCSEC = 0.005
_RAD_TO_ARCSEC = 180.0 / np.pi * 3600.0


@dataclass(frozen=True)
class Morphology:
    """Shape parameters of n galaxies (arrays of length n).

    Attributes
    ----------
    r_half : ndarray (arcsec)
        Half-light radius along the geometric mean of the axes (as GalSim shears preserve area).
    r_half_kpc : ndarray (kpc)
        The same, physical.
    sersic_n : ndarray
    axis_ratio : ndarray
        b/a in (0, 1].
    position_angle : ndarray (deg)
        Major axis, east of north, in [0, 180).
    knot_fraction : ndarray
        Fraction of the light in knots (0 for most galaxies).
    n_knots : ndarray of int
    knot_seed : ndarray of int
        Seed of the knot positions.
    """

    r_half: np.ndarray
    r_half_kpc: np.ndarray
    sersic_n: np.ndarray
    axis_ratio: np.ndarray
    position_angle: np.ndarray
    knot_fraction: np.ndarray
    n_knots: np.ndarray
    knot_seed: np.ndarray


def sersic_index(evolved, deviate):
    """Sersic index from a standard-normal ``deviate``: log10 n ~ N(log10 1.5, 0.2) for
    star-forming and N(log10 3.5, 0.12) for evolved galaxies, clipped to GalSim's range."""
    evolved = np.asarray(evolved, dtype=bool)
    log_n = np.where(evolved, np.log10(3.5) + 0.12 * deviate, np.log10(1.5) + 0.2 * deviate)
    return np.clip(10.0**log_n, *SERSIC_N_RANGE)


def half_light_radius_kpc(z, abs_mag_uv, evolved, abs_mag_opt=None):
    """Median half-light radius (kpc): :func:`.sizes.median_r_half_kpc`."""
    return median_r_half_kpc(z, abs_mag_uv, evolved, abs_mag_opt)


def draw_morphology(z, abs_mag_uv, evolved, rng: np.random.Generator, clumpy: bool = True,
                    abs_mag_opt=None, cosmo=None, d_a_mpc=None) -> Morphology:
    """Draw shapes for galaxies.

    Parameters
    ----------
    z : array_like
    abs_mag_uv : array_like (AB mag)
    evolved : array_like of bool
    rng : numpy.random.Generator
    clumpy : bool
        Give some large star-forming galaxies knots.
    abs_mag_opt : array_like (AB mag), optional
        Rest-550 nm absolute magnitude, for the evolved size relation.
    cosmo : astropy cosmology, optional
    d_a_mpc : array_like (Mpc), optional
        Angular-diameter distances if already known (else computed with ``cosmo``).
    """
    z = np.atleast_1d(np.asarray(z, dtype=float))
    evolved = np.atleast_1d(np.asarray(evolved, dtype=bool))
    n = z.size
    g = np.clip(rng.standard_normal((3, n)), -4.0, 4.0)
    u = rng.random((4, n))
    r_kpc = draw_r_half_kpc(z, abs_mag_uv, evolved, g[0], abs_mag_opt)
    d_a = angular_diameter_distance(z, cosmo) if d_a_mpc is None else np.asarray(d_a_mpc)
    d_a_kpc = d_a * 1e3
    r_arcsec = r_kpc / d_a_kpc * _RAD_TO_ARCSEC
    q = np.where(evolved, np.clip(0.75 + 0.15 * g[2], 0.3, 1.0),
                 np.clip(0.55 + 0.2 * g[2], 0.15, 1.0))
    pa = 180.0 * u[0]
    knotty = clumpy & ~evolved & (r_kpc > 1.0) & (u[1] < 0.6)
    frac = np.where(knotty, 0.05 + 0.25 * u[2], 0.0)
    n_knots = np.where(knotty, 3 + np.floor(13 * u[3]).astype(int), 0)
    seeds = rng.integers(1, 2**31 - 1, size=n)
    return Morphology(r_half=r_arcsec, r_half_kpc=r_kpc, sersic_n=sersic_index(evolved, g[1]),
                      axis_ratio=q, position_angle=pa, knot_fraction=frac, n_knots=n_knots,
                      knot_seed=seeds)


def _keys(row):
    return row.colnames if hasattr(row, "colnames") else row.keys()


def two_component(row: Mapping[str, Any]) -> bool:
    """True if ``row`` is a bulge + disk galaxy (``n_components`` 2, :mod:`.components`)."""
    if "n_components" not in _keys(row):
        return False
    v = row["n_components"]
    return not np.ma.is_masked(v) and int(v) == 2


def _sersic_with_knots(row, n, r, rng_seed, flux=1.0):
    """Unit-``flux`` Sersic (n, half-light radius r) plus the row's knots, unsheared."""
    keys = _keys(row)
    frac = float(row["knot_fraction"]) if "knot_fraction" in keys else 0.0
    n_knots = int(row["n_knots"]) if "n_knots" in keys else 0
    prof = galsim.Sersic(n, half_light_radius=r, trunc=TRUNCATION_RADII * r,
                         flux=flux * (1.0 - frac) if n_knots > 0 else flux)
    if frac > 0 and n_knots > 0:
        seed = int(row["knot_seed"])
        if rng_seed is not None:  # a run seed mixed with the galaxy's own: still per galaxy
            seed = int(np.random.SeedSequence([int(rng_seed), seed]).generate_state(1)[0])
        knots = galsim.RandomKnots(n_knots, half_light_radius=r, flux=flux * frac,
                                   rng=galsim.BaseDeviate(seed))
        blob = galsim.Gaussian(fwhm=max(_KNOT_SIZE_FRACTION * r, _MIN_KNOT_FWHM_ARCSEC),
                               flux=flux * frac / n_knots)
        # a sum of shifted Gaussians equals knots convolved with the blob, but is drawn in
        # real space (an explicit Convolve would make GalSim draw by FFT, ~50x slower here)
        prof = galsim.Sum([prof] + [blob.shift(float(x), float(y)) for x, y in knots.points])
    return prof


def _shear(row, prof):
    q = float(row["axis_ratio"])
    if q < 1.0:
        prof = prof.shear(q=q, beta=(90.0 - float(row["position_angle"])) * galsim.degrees)
    return prof


def make_components(row: Mapping[str, Any], rng_seed: Optional[int] = None):
    """(disk, bulge) unit-flux GalSim profiles of a two-component galaxy (arcsec, x = xi east,
    y = eta north): an exponential disk of ``r_half_disk`` carrying the row's knots and a
    Sersic n = 4 bulge of ``r_half_bulge``, both truncated at :data:`TRUNCATION_RADII`
    half-light radii and sheared to the galaxy's ``axis_ratio`` and ``position_angle``."""
    disk = _sersic_with_knots(row, 1.0, float(row["r_half_disk"]), rng_seed)
    rb = float(row["r_half_bulge"])
    bulge = galsim.Sersic(4.0, half_light_radius=rb, trunc=TRUNCATION_RADII * rb)
    return _shear(row, disk), _shear(row, bulge)


def make_profile(row: Mapping[str, Any], rng_seed: Optional[int] = None,
                 band: Optional[str] = None) -> galsim.GSObject:
    """Unit-flux GalSim profile of one source (arcsec, x = xi east, y = eta north).

    Galaxies: a Sersic profile truncated at :data:`TRUNCATION_RADII` half-light radii
    (half-light radius and unit flux of the truncated profile), plus, if ``knot_fraction`` > 0,
    ``n_knots`` Gaussian knots placed by ``galsim.RandomKnots``; then sheared to ``axis_ratio``
    at ``position_angle`` (east of north). Two-component galaxies (``n_components`` 2): disk
    and bulge (:func:`make_components`) weighted by ``bt_<band>`` (by ``bulge_fraction``, the
    rest-550 nm value, if ``band`` is None). Point sources (kinds ``star`` and ``dwarf``):
    ``galsim.DeltaFunction``.

    Parameters
    ----------
    row : mapping (astropy Row or dict)
        Needs ``kind``; galaxies also ``r_half`` (arcsec), ``sersic_n``, ``axis_ratio``,
        ``position_angle`` (deg), ``knot_fraction``, ``n_knots``.
    rng_seed : int, optional
        Extra seed (e.g. the scenario's) mixed with the row's ``knot_seed`` for the knot
        positions; by default ``knot_seed`` alone.
    band : str, optional
        Band name whose bulge fraction a two-component galaxy takes.
    """
    if row["kind"] in POINT_KINDS:
        return galsim.DeltaFunction(flux=1.0)
    if two_component(row):
        bt = float(row[f"bt_{band}"] if band is not None else row["bulge_fraction"])
        disk, bulge = make_components(row, rng_seed)
        return galsim.Sum([(1.0 - bt) * disk, bt * bulge])
    r = float(row["r_half"])
    n = float(np.clip(row["sersic_n"], *SERSIC_N_RANGE))
    return _shear(row, _sersic_with_knots(row, n, r, rng_seed))
