"""Thin-lens mass profiles: NFW, (truncated) SIS, SIE, point mass and external shear.

Every profile lives at the lens redshift and is stored in *reduced* form, i.e. for a source at
D_ls/D_s = 1; the scaled deflection, convergence and shear of a source at z_s are the reduced
ones times r = D_ls/D_s (all three are linear in the lensing potential psi).

Positions are tangent-plane offsets (xi, eta) in arcsec from the field centre (see
:mod:`simfield.grid`). Shear components are in that frame: the lens-equation Jacobian is
A = [[1 - kappa - gamma1, -gamma2], [-gamma2, 1 - kappa + gamma1]]. Position angles are degrees
east of north (from +eta toward +xi).

Each ``evaluate(x, y)`` returns the reduced ``(alpha_x, alpha_y, kappa, gamma1, gamma2)``,
deflections in arcsec.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy import constants as const
from astropy import units as u

__all__ = [
    "ARCSEC_PER_RAD",
    "NFW",
    "TruncatedSIS",
    "SIE",
    "PointMass",
    "ExternalShear",
    "sigma_crit_reduced",
    "sis_einstein_radius",
    "point_einstein_radius_sq",
    "nfw_parameters",
]

ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0
_C_KMS = const.c.to_value(u.km / u.s)
_TINY = 1e-9  # arcsec; keeps radial profiles finite at their centre


# --------------------------------------------------------------------------------------------
# physical normalisations (all reduced: D_ls/D_s = 1)
# --------------------------------------------------------------------------------------------
def sigma_crit_reduced(d_l_mpc: float) -> float:
    """Critical surface density for D_ls/D_s = 1, c^2/(4 pi G D_l), in Msun/Mpc^2.

    The physical value for a source at z_s is this divided by D_ls/D_s
    (Sigma_cr = c^2/(4 pi G) D_s/(D_l D_ls); Schneider, Ehlers & Falco 1992).
    """
    val = const.c**2 / (4 * np.pi * const.G * (d_l_mpc * u.Mpc))
    return float(val.to_value(u.Msun / u.Mpc**2))


def sis_einstein_radius(sigma_kms):
    """Reduced SIS Einstein radius 4 pi (sigma/c)^2 in arcsec (SEF 1992, D_ls/D_s = 1)."""
    return 4.0 * np.pi * (np.asarray(sigma_kms, dtype=float) / _C_KMS) ** 2 * ARCSEC_PER_RAD


def point_einstein_radius_sq(mass_msun: float, d_l_mpc: float) -> float:
    """Reduced point-mass theta_E^2 = 4 G M / (c^2 D_l) in arcsec^2 (D_ls/D_s = 1)."""
    val = 4 * const.G * (mass_msun * u.Msun) / (const.c**2 * (d_l_mpc * u.Mpc))
    return float(val.to_value(u.dimensionless_unscaled)) * ARCSEC_PER_RAD**2


def nfw_parameters(m200_msun: float, concentration: float, z_l: float, cosmo):
    """NFW scale radius and reduced convergence scale.

    Parameters
    ----------
    m200_msun : float (Msun)
        Mass inside r200, the radius of mean density 200 x the critical density at z_l.
    concentration : float
        c = r200 / r_s.
    z_l : float
        Lens redshift.
    cosmo : astropy.cosmology.FLRW

    Returns
    -------
    theta_s : float (arcsec)
        Angular scale radius r_s / D_l.
    kappa_s : float
        rho_s r_s / Sigma_cr for D_ls/D_s = 1 (Wright & Brainerd 2000, ApJ 534, 34 [mem]:
        rho_s = delta_c rho_crit, delta_c = (200/3) c^3 / (ln(1+c) - c/(1+c))).
    """
    rho_c = cosmo.critical_density(z_l).to_value(u.Msun / u.Mpc**3)
    r200 = (3.0 * m200_msun / (4.0 * np.pi * 200.0 * rho_c)) ** (1.0 / 3.0)  # Mpc
    c = concentration
    delta_c = 200.0 / 3.0 * c**3 / (np.log1p(c) - c / (1.0 + c))
    r_s = r200 / c
    d_l = cosmo.angular_diameter_distance(z_l).to_value(u.Mpc)
    kappa_s = delta_c * rho_c * r_s / sigma_crit_reduced(d_l)
    return r_s / d_l * ARCSEC_PER_RAD, kappa_s


# --------------------------------------------------------------------------------------------
# geometry helpers
# --------------------------------------------------------------------------------------------
def _to_local(x, y, x0, y0, pa_deg):
    """Offsets in the frame whose +x' axis is the major axis (PA east of north)."""
    phi = np.deg2rad(90.0 - pa_deg)  # angle of the major axis from +xi toward +eta
    c, s = np.cos(phi), np.sin(phi)
    dx = np.asarray(x, dtype=float) - x0
    dy = np.asarray(y, dtype=float) - y0
    return c * dx + s * dy, -s * dx + c * dy, c, s


def _to_global(ax, ay, kap, g1, g2, c, s):
    """Rotate a local deflection (vector) and shear (spin 2) back to the (xi, eta) frame."""
    c2, s2 = c * c - s * s, 2 * s * c
    return (c * ax - s * ay, s * ax + c * ay, kap, c2 * g1 - s2 * g2, s2 * g1 + c2 * g2)


def _radial_hessian(alpha, kappa, x, y, q):
    """Deflection and Hessian of psi(r_e), r_e^2 = q x^2 + y^2/q, from a radial profile.

    ``alpha(r)`` = psi'(r) and ``kappa(r)`` are the circular profile's deflection and
    convergence; psi''(r) = 2 kappa - alpha/r follows from the 2D Poisson equation. With
    q = 1 this is the circular lens; q < 1 gives an elliptical potential (e.g. Golse & Kneib
    2002, A&A 390, 821 [mem]).
    """
    if q == 1.0:
        return _circular(alpha, kappa, x, y)
    a, b = q, 1.0 / q
    r = np.sqrt(a * x * x + b * y * y)
    r = np.maximum(r, _TINY)
    al = alpha(r)
    d2 = 2.0 * kappa(r) - al / r
    rx, ry = a * x / r, b * y / r
    rxx = a / r - a * a * x * x / r**3
    ryy = b / r - b * b * y * y / r**3
    rxy = -a * b * x * y / r**3
    pxx = d2 * rx * rx + al * rxx
    pyy = d2 * ry * ry + al * ryy
    pxy = d2 * rx * ry + al * rxy
    return al * rx, al * ry, 0.5 * (pxx + pyy), 0.5 * (pxx - pyy), pxy


def _circular(alpha, kappa, x, y):
    """Round lens: alpha along theta, |gamma| = mean kappa - kappa, tangential (SEF 1992).

    gamma1 = -|gamma| cos 2 phi, gamma2 = -|gamma| sin 2 phi.
    """
    r2 = np.maximum(x * x + y * y, _TINY * _TINY)
    r = np.sqrt(r2)
    a_over_r = alpha(r) / r
    kap = kappa(r)
    g = (kap - a_over_r) / r2  # -|gamma| / r^2
    return (a_over_r * x, a_over_r * y, kap, g * (x * x - y * y), 2.0 * g * x * y)


# --------------------------------------------------------------------------------------------
# profiles
# --------------------------------------------------------------------------------------------
def _nfw_h(x):
    """h(x) = arccosh(1/x)/sqrt(1-x^2) (x<1), arccos(1/x)/sqrt(x^2-1) (x>1), 1 at x=1."""
    x = np.asarray(x, dtype=float)
    out = np.ones_like(x)
    lo = x < 1.0 - 1e-5
    hi = x > 1.0 + 1e-5
    mid = ~(lo | hi)
    xl = x[lo]
    out[lo] = np.arccosh(1.0 / xl) / np.sqrt(1.0 - xl * xl)
    xh = x[hi]
    out[hi] = np.arccos(1.0 / xh) / np.sqrt(xh * xh - 1.0)
    out[mid] = 1.0 - 2.0 / 3.0 * (x[mid] - 1.0)  # Taylor expansion about x = 1
    return out


@dataclass(frozen=True)
class NFW:
    """NFW halo (Navarro, Frenk & White 1997) in thin-lens form.

    Closed forms of Wright & Brainerd 2000 (ApJ 534, 34) eqs. 11-13, written with
    h(x) (see :func:`_nfw_h`): kappa(x) = 2 kappa_s (1 - h) / (x^2 - 1),
    mean kappa inside x = 4 kappa_s (ln(x/2) + h) / x^2, deflection = theta x mean kappa.

    Attributes
    ----------
    x0, y0 : float (arcsec)
        Centre.
    theta_s : float (arcsec)
        Angular scale radius.
    kappa_s : float
        Reduced convergence scale (D_ls/D_s = 1).
    q : float
        Axis ratio of the potential (1: round).
    pa_deg : float (deg)
        Position angle of the potential's major axis, east of north.
    """

    x0: float
    y0: float
    theta_s: float
    kappa_s: float
    q: float = 1.0
    pa_deg: float = 0.0

    def _alpha(self, r):
        x = r / self.theta_s
        return 4.0 * self.kappa_s * self.theta_s * (np.log(x / 2.0) + _nfw_h(x)) / x

    def _kappa(self, r):
        x = r / self.theta_s
        x2m1 = x * x - 1.0
        near = np.abs(x2m1) < 1e-4
        safe = np.where(near, 1.0, x2m1)
        return 2.0 * self.kappa_s * np.where(near, 1.0 / 3.0, (1.0 - _nfw_h(x)) / safe)

    def evaluate(self, x, y):
        """Reduced (alpha_x, alpha_y (arcsec), kappa, gamma1, gamma2) at (x, y) (arcsec)."""
        lx, ly, c, s = _to_local(x, y, self.x0, self.y0, self.pa_deg)
        return _to_global(*_radial_hessian(self._alpha, self._kappa, lx, ly, self.q), c, s)


@dataclass(frozen=True)
class TruncatedSIS:
    """Singular isothermal sphere, optionally truncated (pseudo-Jaffe form).

    kappa = theta_E/2 (1/r - 1/sqrt(r^2 + a^2)): an SIS minus a cored isothermal of core a,
    so the mass is finite, M(<inf) = pi Sigma_cr theta_E a ("pseudo-Jaffe"; Keeton 2001,
    astro-ph/0102341 [mem]). ``a = inf`` is the plain SIS with alpha = theta_E (SEF 1992).

    Attributes
    ----------
    x0, y0 : float (arcsec)
    theta_e : float (arcsec)
        Reduced Einstein radius 4 pi (sigma/c)^2.
    r_trunc : float (arcsec)
        Truncation radius a; ``inf`` for none.
    """

    x0: float
    y0: float
    theta_e: float
    r_trunc: float = np.inf

    def _alpha(self, r):
        if np.isinf(self.r_trunc):
            return np.full_like(r, self.theta_e)
        a = self.r_trunc
        return self.theta_e * (1.0 - (np.sqrt(r * r + a * a) - a) / r)

    def _kappa(self, r):
        k = 0.5 * self.theta_e / r
        if np.isinf(self.r_trunc):
            return k
        return k - 0.5 * self.theta_e / np.sqrt(r * r + self.r_trunc**2)

    def evaluate(self, x, y):
        """Reduced (alpha_x, alpha_y (arcsec), kappa, gamma1, gamma2) at (x, y) (arcsec)."""
        lx = np.asarray(x, dtype=float) - self.x0
        ly = np.asarray(y, dtype=float) - self.y0
        return _radial_hessian(self._alpha, self._kappa, lx, ly, 1.0)


@dataclass(frozen=True)
class SIE:
    """Singular isothermal ellipsoid, kappa = theta_E / (2 sqrt(q x'^2 + y'^2/q)).

    theta_E is the reduced Einstein radius of the SIS of the same velocity dispersion
    (intermediate-axis normalisation, Kormann, Schneider & Bartelmann 1994, A&A 284, 285 [mem]).
    Deflection in closed form (Keeton 2001, astro-ph/0102341 [mem], SIE with zero core):
    alpha_x' = b q/e atan(e x'/psi), alpha_y' = b q/e atanh(e y'/psi), psi = sqrt(q^2 x'^2 + y'^2),
    e = sqrt(1 - q^2), b = theta_E / sqrt(q). The Hessian follows by differentiation.
    """

    x0: float
    y0: float
    theta_e: float
    q: float
    pa_deg: float = 0.0

    def evaluate(self, x, y):
        """Reduced (alpha_x, alpha_y (arcsec), kappa, gamma1, gamma2) at (x, y) (arcsec)."""
        lx, ly, c, s = _to_local(x, y, self.x0, self.y0, self.pa_deg)
        q = min(self.q, 1.0 - 1e-6)
        b = self.theta_e / np.sqrt(q)
        e = np.sqrt(1.0 - q * q)
        psi = np.maximum(np.sqrt(q * q * lx * lx + ly * ly), _TINY)
        r2 = np.maximum(lx * lx + ly * ly, _TINY**2)
        ax = b * q / e * np.arctan(e * lx / psi)
        ay = b * q / e * np.arctanh(np.clip(e * ly / psi, -1 + 1e-15, 1 - 1e-15))
        kap = 0.5 * b * q / psi
        g1 = 0.5 * b * q * (ly * ly - lx * lx) / (psi * r2)
        g2 = -b * q * lx * ly / (psi * r2)
        return _to_global(ax, ay, kap, g1, g2, c, s)


@dataclass(frozen=True)
class PointMass:
    """Point mass: alpha = theta_E^2 theta/|theta|^2, kappa = 0 off-centre (SEF 1992)."""

    x0: float
    y0: float
    theta_e_sq: float  #: reduced theta_E^2 (arcsec^2)

    def evaluate(self, x, y):
        """Reduced (alpha_x, alpha_y (arcsec), kappa, gamma1, gamma2) at (x, y) (arcsec)."""
        lx = np.asarray(x, dtype=float) - self.x0
        ly = np.asarray(y, dtype=float) - self.y0
        te2 = self.theta_e_sq
        return _radial_hessian(lambda r: te2 / r, lambda r: np.zeros_like(r), lx, ly, 1.0)


@dataclass(frozen=True)
class ExternalShear:
    """Constant external shear, psi = gamma1 (x^2 - y^2)/2 + gamma2 x y (reduced values)."""

    gamma1: float
    gamma2: float

    def evaluate(self, x, y):
        """Reduced (alpha_x, alpha_y (arcsec), kappa, gamma1, gamma2) at (x, y) (arcsec)."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        z = np.zeros(np.broadcast(x, y).shape)
        return (self.gamma1 * x + self.gamma2 * y, self.gamma2 * x - self.gamma1 * y,
                z, z + self.gamma1, z + self.gamma2)
