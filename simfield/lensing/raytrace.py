"""A composite thin lens at one redshift, its distance scaling and cached deflection fields.

All components sit at ``z_l``. The reduced fields (deflection, convergence, shear for
D_ls/D_s = 1) are summed over components; a source at z_s sees them times
r(z_s) = D_ls/D_s (0 for z_s <= z_l: foreground sources are not lensed). The lens equation is
beta = theta - r alpha_red(theta), all in arcsec on the tangent plane (see
:mod:`simfield.grid`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from astropy import units as u
from scipy import ndimage

from ..config import LensConfig
from ..cosmo import default_cosmology
from .profiles import (NFW, SIE, ExternalShear, PointMass, TruncatedSIS, nfw_parameters,
                       point_einstein_radius_sq, sis_einstein_radius)

__all__ = ["Lens", "LensField", "build_lens", "member_truncation_arcsec"]

# Truncation radius of member halos, a = 40 kpc (sigma / 200 km/s)^2: galaxy-galaxy lensing in
# clusters finds truncation radii of a few tens of kpc for L* members [mem]. Scaling with sigma^2
# keeps M/L roughly constant for Faber-Jackson L ~ sigma^4 (common practice).
_MEMBER_TRUNC_KPC = 40.0
_Z_TABLE_MAX = 30.0  # source redshifts up to this use the tabulated distance ratio
_MEMBER_SIGMA_REF = 200.0


@dataclass(frozen=True)
class LensField:
    """Reduced lensing fields sampled on a regular grid of (xi, eta), for interpolation.

    Node (i, j) sits at xi = x0 + j * step, eta = y0 + i * step (arrays indexed [i, j]).

    Attributes
    ----------
    x0, y0 : float (arcsec)
        Position of node [0, 0].
    step : float (arcsec)
        Node spacing.
    ax, ay : ndarray (arcsec)
        Reduced deflection.
    kappa, gamma1, gamma2 : ndarray
        Reduced convergence and shear.
    """

    x0: float
    y0: float
    step: float
    ax: np.ndarray
    ay: np.ndarray
    kappa: np.ndarray
    gamma1: np.ndarray
    gamma2: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        return self.ax.shape

    def node_positions(self):
        """(xi, eta) of every node (arcsec), each of the grid's shape."""
        ny, nx = self.shape
        return np.meshgrid(self.x0 + self.step * np.arange(nx),
                           self.y0 + self.step * np.arange(ny))

    def interpolate(self, x, y, names=("ax", "ay")):
        """Bilinear interpolation of the named fields at (x, y) (arcsec); outside: edge value."""
        coords = np.array([(np.asarray(y, float) - self.y0) / self.step,
                           (np.asarray(x, float) - self.x0) / self.step])
        return tuple(ndimage.map_coordinates(getattr(self, n), coords, order=1, mode="nearest")
                     for n in names)


@dataclass(frozen=True, eq=False)
class Lens:
    """A composite thin lens.

    Attributes
    ----------
    redshift : float
        Lens redshift z_l.
    components : tuple
        Profiles of :mod:`simfield.lensing.profiles`, each with ``evaluate(x, y)``.
    cosmo : astropy.cosmology.FLRW
    reference_redshift : float
        Source redshift for maps and critical curves.
    """

    redshift: float
    components: tuple
    cosmo: object
    reference_redshift: float = 9.0
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    # ---- distances -------------------------------------------------------------------------
    def distance_ratio(self, z_s):
        """D_ls / D_s for sources at ``z_s`` (0 where z_s <= z_l), dimensionless."""
        z = np.atleast_1d(np.asarray(z_s, dtype=float))
        out = np.zeros_like(z)
        bg = z > self.redshift
        if bg.any():
            lz, ratio = self._ratio_table()
            inside = bg & (z <= _Z_TABLE_MAX)
            out[inside] = np.interp(np.log1p(z[inside]), lz, ratio)
            far = bg & ~inside
            if far.any():
                out[far] = self._exact_ratio(z[far])
        return out if np.ndim(z_s) else float(out[0])

    def _exact_ratio(self, z):
        d_ls = self.cosmo.angular_diameter_distance(self.redshift, z).to_value(u.Mpc)
        return d_ls / self.cosmo.angular_diameter_distance(z).to_value(u.Mpc)

    def _ratio_table(self):
        """D_ls/D_s tabulated on a fine grid of ln(1+z) (linear interpolation error < 1e-6)."""
        if "ratio" not in self._cache:
            lz = np.linspace(np.log1p(self.redshift), np.log1p(_Z_TABLE_MAX), 4000)
            ratio = np.zeros_like(lz)
            ratio[1:] = self._exact_ratio(np.expm1(lz[1:]))
            self._cache["ratio"] = (lz, ratio)
        return self._cache["ratio"]

    # ---- fields ----------------------------------------------------------------------------
    def reduced(self, x, y):
        """Reduced (alpha_x, alpha_y (arcsec), kappa, gamma1, gamma2) at (x, y) (arcsec)."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        shape = np.broadcast(x, y).shape
        tot = [np.zeros(shape) for _ in range(5)]
        for comp in self.components:
            for t, v in zip(tot, comp.evaluate(x, y)):
                t += v
        return tuple(tot)

    def deflection(self, x, y, z_s):
        """Scaled deflection (alpha_x, alpha_y) in arcsec at (x, y) (arcsec) for sources at z_s."""
        r = self.distance_ratio(z_s)
        ax, ay, *_ = self.reduced(x, y)
        return r * ax, r * ay

    def convergence(self, x, y, z_s):
        """Convergence kappa (dimensionless) at (x, y) (arcsec) for sources at z_s."""
        return self.distance_ratio(z_s) * self.reduced(x, y)[2]

    def shear(self, x, y, z_s):
        """Shear (gamma1, gamma2) in the (xi, eta) frame at (x, y) (arcsec) for sources at z_s."""
        r = self.distance_ratio(z_s)
        g = self.reduced(x, y)
        return r * g[3], r * g[4]

    def magnification(self, x, y, z_s):
        """Signed magnification mu = 1/((1-kappa)^2 - |gamma|^2) at (x, y) (arcsec)."""
        r = self.distance_ratio(z_s)
        _, _, k, g1, g2 = self.reduced(x, y)
        det = (1.0 - r * k) ** 2 - (r * g1) ** 2 - (r * g2) ** 2
        with np.errstate(divide="ignore"):
            return 1.0 / det

    def source_position(self, x, y, z_s):
        """Source-plane position beta = theta - alpha (arcsec) of image-plane (x, y) (arcsec)."""
        ax, ay = self.deflection(x, y, z_s)
        return np.asarray(x, float) - ax, np.asarray(y, float) - ay

    def field_on_grid(self, x0: float, y0: float, step: float, nx: int, ny: int) -> LensField:
        """Reduced fields on nodes x0 + j step, y0 + i step (arcsec), cached per geometry."""
        key = ("field", round(x0, 9), round(y0, 9), round(step, 12), int(nx), int(ny))
        if key not in self._cache:
            xs = x0 + step * np.arange(nx)
            ys = y0 + step * np.arange(ny)
            arrays = [np.empty((ny, nx)) for _ in range(5)]
            rows = max(1, 400_000 // max(nx, 1))  # evaluate in row blocks to bound memory
            for i in range(0, ny, rows):
                xx, yy = np.meshgrid(xs, ys[i:i + rows])
                for a, v in zip(arrays, self.reduced(xx, yy)):
                    a[i:i + rows] = v
            self._cache[key] = LensField(x0, y0, step, *arrays)
        return self._cache[key]


def member_truncation_arcsec(sigma_kms, z_l: float, cosmo) -> np.ndarray:
    """Truncation radius of member halos, 40 kpc (sigma/200 km/s)^2, in arcsec [mem]."""
    d_l_kpc = cosmo.angular_diameter_distance(z_l).to_value(u.kpc)
    a_kpc = _MEMBER_TRUNC_KPC * (np.asarray(sigma_kms, float) / _MEMBER_SIGMA_REF) ** 2
    return a_kpc / d_l_kpc * (180.0 / np.pi * 3600.0)


def build_lens(lens_cfg: LensConfig, members=None, cosmo=None) -> Lens:
    """Turn a validated :class:`~simfield.config.LensConfig` into a :class:`Lens`.

    Parameters
    ----------
    lens_cfg : LensConfig
        Components: ``nfw`` (mass_msun = M200c in Msun, concentration, axis_ratio of the
        potential), ``sis`` / ``sie`` (sigma_kms in km/s), ``point`` (mass_msun in Msun),
        ``shear`` (gamma1, gamma2 as seen by a source at ``lens_cfg.reference_redshift``).
    members : astropy.table.Table, optional
        Cluster members with columns x_arcsec, y_arcsec (arcsec), sigma_kms (km/s); each becomes
        a truncated SIS (see :func:`member_truncation_arcsec`).
    cosmo : astropy.cosmology.FLRW, optional
        Defaults to :func:`simfield.cosmo.default_cosmology`.
    """
    cosmo = cosmo or default_cosmology()
    z_l = float(lens_cfg.redshift)
    d_l = cosmo.angular_diameter_distance(z_l).to_value(u.Mpc)
    probe = Lens(z_l, (), cosmo, float(lens_cfg.reference_redshift))
    r_ref = probe.distance_ratio(lens_cfg.reference_redshift)
    comps = []
    for c in lens_cfg.components:
        if c.kind == "nfw":
            theta_s, kappa_s = nfw_parameters(c.mass_msun, c.concentration, z_l, cosmo)
            comps.append(NFW(c.x_arcsec, c.y_arcsec, theta_s, kappa_s, c.axis_ratio,
                             c.position_angle_deg))
        elif c.kind == "sis" or (c.kind == "sie" and c.axis_ratio >= 1.0):
            trunc = c.truncation_arcsec if c.truncation_arcsec > 0 else np.inf
            comps.append(TruncatedSIS(c.x_arcsec, c.y_arcsec,
                                      float(sis_einstein_radius(c.sigma_kms)), trunc))
        elif c.kind == "sie":
            comps.append(SIE(c.x_arcsec, c.y_arcsec, float(sis_einstein_radius(c.sigma_kms)),
                             c.axis_ratio, c.position_angle_deg))
        elif c.kind == "point":
            comps.append(PointMass(c.x_arcsec, c.y_arcsec,
                                   point_einstein_radius_sq(c.mass_msun, d_l)))
        elif c.kind == "shear":
            comps.append(ExternalShear(c.gamma1 / r_ref, c.gamma2 / r_ref))
    if members is not None and len(members) > 0:
        sig = np.asarray(members["sigma_kms"], dtype=float)
        trunc = member_truncation_arcsec(sig, z_l, cosmo)
        for x, y, s, a in zip(np.asarray(members["x_arcsec"], float),
                              np.asarray(members["y_arcsec"], float), sig, trunc):
            if s > 0:
                comps.append(TruncatedSIS(float(x), float(y), float(sis_einstein_radius(s)),
                                          float(a)))
    return Lens(z_l, tuple(comps), cosmo, float(lens_cfg.reference_redshift))
