"""Effective volume and expected counts of a selected sample, from a binned S(M_UV, z).

V_eff(M) = integral S(M, z) dV_c/dz dz over the source-plane solid angle (Steidel et al.
1999, ApJ 519, 1; Bouwens et al. 2015, ApJ 803, 34, sec. 3), with S constant in each z bin:
V_eff(M) = sum_j S(M, z_j) [V_c(z_j+1) - V_c(z_j)] Omega_s / (4 pi sr) (astropy.cosmology
comoving volumes). Expected number N = sum_ij S_ij integral_cell phi(M, z) dM dV_c.
Behind a lens dOmega_source = dOmega_image / |mu|; from the truth, truth sources fall on the
image plane with density n_s / |mu| per image-plane area, so sum_images |mu_i| estimates
n_s Omega_image and Omega_s = Omega_image N_sources / sum_images |mu_i| (each source counted
once; exactly Omega_image for an unlensed field).

Units: magnitudes AB, solid angles arcsec^2, volumes Mpc^3 (comoving), phi Mpc^-3 mag^-1.
"""

from __future__ import annotations

import numpy as np
from astropy.table import Table
from scipy import stats

from .. import cosmo as _cosmo

__all__ = ["source_plane_area", "selection_volume", "expected_counts", "poisson_summary"]


def source_plane_area(image_area_arcsec2: float, img_magnification, n_sources: int) -> float:
    """Source-plane solid angle (arcsec^2) of a field from its truth images' |mu|.

    Parameters
    ----------
    image_area_arcsec2 : float (arcsec^2)
    img_magnification : array_like
        |mu| of every truth image on the field of the sources counted.
    n_sources : int
        Number of distinct sources those images belong to.
    """
    mu = np.abs(np.asarray(img_magnification, float))
    mu = mu[np.isfinite(mu) & (mu > 0)]
    if mu.size == 0 or n_sources <= 0:
        return float(image_area_arcsec2)
    return float(image_area_arcsec2) * n_sources / float(mu.sum())


def _shell_volumes(z_edges, area_arcsec2, cosmology=None):
    c = cosmology or _cosmo.default_cosmology()
    v = c.comoving_volume(np.asarray(z_edges, float)).value
    return np.diff(v) * area_arcsec2 / (4 * np.pi * _cosmo.ARCSEC2_PER_SR)


def selection_volume(frac, abs_mag_edges, z_edges, area_arcsec2: float,
                     z_window=None, cosmology=None) -> Table:
    """V_eff per M_UV bin from the selection fraction on a (M_UV, z) grid.

    Parameters
    ----------
    frac : ndarray, shape (n_M, n_z)
        S per cell (dimensionless); NaN (no truth source) counts as 0.
    abs_mag_edges, z_edges : array_like (AB mag; redshift)
    area_arcsec2 : float (arcsec^2)
        Source-plane solid angle.
    z_window : (float, float), optional
        Also give the part of V_eff from z bins inside this window.

    Returns
    -------
    Table
        ``abs_mag_uv_lo``, ``abs_mag_uv_hi``, ``v_eff_mpc3`` (Mpc^3), ``v_eff_window_mpc3``.
    """
    s = np.nan_to_num(np.asarray(frac, float))
    ze = np.asarray(z_edges, float)
    dv = _shell_volumes(ze, area_arcsec2, cosmology)
    t = Table()
    me = np.asarray(abs_mag_edges, float)
    t["abs_mag_uv_lo"], t["abs_mag_uv_hi"] = me[:-1], me[1:]
    t["v_eff_mpc3"] = s @ dv
    if z_window is not None:
        inw = (ze[:-1] >= z_window[0] - 1e-9) & (ze[1:] <= z_window[1] + 1e-9)
        t["v_eff_window_mpc3"] = s[:, inw] @ dv[inw]
    return t


def expected_counts(frac, abs_mag_edges, z_edges, area_arcsec2: float, phi,
                    n_sub: int = 8, cosmology=None) -> np.ndarray:
    """Expected selected number per (M_UV, z) cell, S_ij x integral_cell phi dM dV_c.

    Parameters
    ----------
    frac : ndarray, shape (n_M, n_z)
        S per cell; NaN counts as 0.
    abs_mag_edges, z_edges : array_like (AB mag; redshift)
    area_arcsec2 : float (arcsec^2)
        Source-plane solid angle.
    phi : callable (M_UV [AB mag], z) -> Mpc^-3 mag^-1
        Luminosity function (broadcast).
    n_sub : int
        Trapezoid points per cell side.

    Returns
    -------
    ndarray, shape (n_M, n_z)
        Expected counts (dimensionless).
    """
    me, ze = np.asarray(abs_mag_edges, float), np.asarray(z_edges, float)
    out = np.zeros((me.size - 1, ze.size - 1))
    for j in range(ze.size - 1):
        zz = np.linspace(ze[j], ze[j + 1], n_sub)
        dvdz = _cosmo.comoving_volume_element(zz, cosmology) * area_arcsec2
        for i in range(me.size - 1):
            mm = np.linspace(me[i], me[i + 1], n_sub)
            p = np.asarray(phi(mm[:, None], zz[None, :]), float)
            out[i, j] = np.trapezoid(np.trapezoid(p, mm, axis=0) * dvdz, zz)
    return np.nan_to_num(np.asarray(frac, float)) * out


def poisson_summary(n_observed: int, expected: float) -> dict:
    """Poisson probabilities of an observed count (scipy.stats.poisson).

    Returns
    -------
    dict
        ``n_observed``, ``n_expected``, ``p_equal`` P(N = n), ``p_at_most`` P(N <= n),
        ``p_at_least`` P(N >= n), ``p_zero`` P(N = 0).
    """
    mu = float(expected)
    n = int(n_observed)
    return {"n_observed": n, "n_expected": mu,
            "p_equal": float(stats.poisson.pmf(n, mu)),
            "p_at_most": float(stats.poisson.cdf(n, mu)),
            "p_at_least": float(stats.poisson.sf(n - 1, mu)),
            "p_zero": float(stats.poisson.pmf(0, mu))}
