"""Light-cone galaxies below z = 2 from the rest-K luminosity function, and the rest-UV excess.

Below :data:`NIR_LF_Z_MAX` the near-infrared bands see rest-optical light, where red, quiescent
galaxies missing from a UV-selected function dominate the bright end. There the light cone
(:mod:`.lightcone`) draws (z, M_K) from the rest-K function of Cirasuolo et al. 2010
(:func:`.luminosity.nir_lf_parameters`), gives each galaxy the evolved template with
:func:`quiescent_fraction`, and sets M_UV so that the template's rest-J (1.2 um, the template's
near-infrared knee) magnitude is M_K + (J - K)_AB (:func:`uv_from_k`). The rest-K fit is
extrapolated beyond its data at the faint end; the rest-UV function (measured 3-4 mag deeper)
then supplies the star-forming galaxies beyond it, thinned by :func:`uv_excess_fraction` so
that each galaxy is drawn once. From :data:`NIR_LF_Z_MAX` to :data:`QUIESCENT_Z_MAX` the
rest-K function supplies only its quiescent part: a galaxy of the rest-UV function is
UV-luminous by selection, and an evolved template normalised to its UV magnitude would be a
~5 mag brighter rest-K galaxy (M_UV - M_J ~ 5.3 for the evolved template), ten times more
numerous at z = 2-3 than the rest-K function allows for galaxies that bright.

Units: magnitudes AB, wavelengths nm.
"""

from __future__ import annotations

import numpy as np

from .luminosity import nir_lf_parameters, schechter_phi, uv_luminosity_function
from .seds import J_MINUS_K_AB, SEDParameters, rest_fnu_shape, sed_parameters_from_deviates

__all__ = ["NIR_LF_Z_MAX", "QUIESCENT_Z_MAX", "J_MINUS_K_AB", "quiescent_fraction", "uv_excess_fraction",
           "uv_from_k", "faint_k_cut", "abs_mag_k_faint"]

#: Below this redshift the light cone draws rest-K magnitudes.
NIR_LF_Z_MAX = 2.0
#: From :data:`NIR_LF_Z_MAX` up to this redshift (the reach of the Cirasuolo et al. 2010 fit,
#: z ~ 4) the rest-K function supplies the quiescent galaxies only (:func:`quiescent_fraction`
#: of it); the star-forming ones come from the rest-UV function, measured there directly.
QUIESCENT_Z_MAX = 4.0
#: Rest J (nm) at which a rest-K magnitude sets the template: the template's near-infrared
#: knee, where its optical segment ends (:mod:`.seds`).
_J_NM = 1200.0
#: Bounds used to pre-select rest-K draws (mag): every template has M_UV - M_J >= -2.21
#: (bluest beta -3.2, beta_opt -2.8, break >= 1: 2.5 log10 of (380/150)^-1.2 (1200/380)^-0.8)
#: and no band brighter than rest J by more than those 2.21 mag plus the strongest lines
#: (EW(Halpha) 1500 A over a >= 20 % wide band with Halpha + Hbeta + [OIII]: < 1 mag);
#: margins rounded up.
_UV_MINUS_J_MIN = -2.5
_BAND_MINUS_J_MIN = -3.5


def quiescent_fraction(z, abs_mag_k):
    """Fraction of galaxies with the evolved template among those of rest-K magnitude
    ``abs_mag_k`` (AB) at redshift ``z``.

    f = q(z) / (1 + 10^(0.4 (M_K - M*_K(z)))), q(z) = 1 / (1 + (z / 2)^2): half of the
    galaxies at M*_K (~5e10 Msun at every z, Mortlock et al. 2017, MNRAS 465, 672 [mem]) are
    quiescent locally and a quarter at z = 2, falling with luminosity (factor 10 per 2.5 mag,
    as stellar mass); shaped by the quiescent fractions versus mass and z of Baldry et al.
    2006, MNRAS 373, 469 and Muzzin et al. 2013, ApJ 777, 18 [mem] (project choice).
    """
    z = np.asarray(z, dtype=float)
    q = 1.0 / (1.0 + (z / 2.0) ** 2)
    return q / (1.0 + 10.0 ** (0.4 * (np.asarray(abs_mag_k, float)
                                       - nir_lf_parameters(z).m_star)))


def _mean_uv_minus_j(z, m_uv):
    """M_UV - M_J (AB mag) of the mean star-forming template (all deviates 0)."""
    z = np.asarray(z, dtype=float)
    m_uv = np.broadcast_to(np.asarray(m_uv, dtype=float), z.shape)
    sed = sed_parameters_from_deviates(z.ravel(), m_uv.ravel(), np.zeros(z.size, bool),
                                       np.zeros((3, z.size)))
    c = 2.5 * np.log10(rest_fnu_shape(_J_NM, sed.beta, sed.break_strength, sed.beta_opt))
    return c.reshape(z.shape)


def uv_excess_fraction(z, abs_mag_uv):
    """Fraction of the rest-UV function's galaxies at (z, M_UV) drawn as rest-UV galaxies.

    1 at z >= :data:`NIR_LF_Z_MAX`. Below, every galaxy is in the rest-K function and the
    star-forming ones also in the rest-UV one; a galaxy must be drawn once, from either. With
    M_J(M_UV) of the mean star-forming template, the star-forming rest-K galaxies per unit
    M_UV are phi_K(M_J - (J-K)) (1 - f_q) dM_J/dM_UV (:func:`quiescent_fraction`); the
    rest-UV draws add what the rest-UV function has beyond them,
    max(0, 1 - that / phi_UV(M_UV)), so that at each M_UV the star-forming density is the
    larger of the two published functions (the rest-K one at the bright end, the rest-UV one
    at the faint end, where the rest-K fit is extrapolated beyond its data).
    """
    z = np.asarray(z, dtype=float)
    m = np.asarray(abs_mag_uv, dtype=float)
    z, m = np.broadcast_arrays(z, m)
    low = z < NIR_LF_Z_MAX
    out = np.ones(z.shape)
    if not np.any(low):
        return out
    zl, ml = z[low], m[low]
    h = 0.05  # mag: finite difference of M_J(M_UV)
    m_j = ml - _mean_uv_minus_j(zl, ml)
    dj = ((ml + h - _mean_uv_minus_j(zl, ml + h)) - (ml - h - _mean_uv_minus_j(zl, ml - h))) \
        / (2.0 * h)
    m_k = m_j - J_MINUS_K_AB
    pk = nir_lf_parameters(zl)
    phi_k = schechter_phi(m_k, pk.m_star, pk.phi_star, pk.alpha) \
        * (1.0 - quiescent_fraction(zl, m_k)) * dj
    phi_uv = uv_luminosity_function(ml, zl)
    out[low] = np.clip(1.0 - np.divide(phi_k, phi_uv, out=np.ones_like(phi_k),
                                       where=phi_uv > 0), 0.0, 1.0)
    return out


def uv_from_k(z, abs_mag_k, evolved, deviates):
    """(M_UV, SEDParameters) of galaxies of rest-K magnitude ``abs_mag_k`` (AB): the template
    from ``deviates`` (shape (3, n), :func:`.seds.sed_parameters_from_deviates`) and M_UV
    such that the template's rest-J magnitude is M_K + (J - K)_AB.

    Fixed point M_UV = M_J + (M_UV - M_J)(beta(M_UV)): |d(M_UV - M_J)/dM_UV| <= 0.45 (2.26 mag
    per unit beta, d beta / d M_UV = -0.2), so 10 steps leave < 1e-3 mag.
    """
    m_j = np.asarray(abs_mag_k, dtype=float) + J_MINUS_K_AB
    m = m_j + 2.0  # start: a typical star-forming M_UV - M_J
    for _ in range(10):
        sed = sed_parameters_from_deviates(z, m, evolved, deviates)
        m = m_j + 2.5 * np.log10(rest_fnu_shape(_J_NM, sed.beta, sed.break_strength,
                                                sed.beta_opt))
    sed: SEDParameters = sed_parameters_from_deviates(z, m, evolved, deviates)
    return m, sed


def abs_mag_k_faint(abs_mag_faint):
    """Faintest rest-K magnitude (AB) whose M_UV can be brighter than ``abs_mag_faint``."""
    return abs_mag_faint - _UV_MINUS_J_MIN - J_MINUS_K_AB


def faint_k_cut(mag_limit, abs_mag_faint, dist):
    """``cut(z)``: the faintest rest-K magnitude (AB) that could pass the apparent limit
    ``mag_limit`` (AB, any band) and ``abs_mag_faint`` (rest UV); ``dist`` gives DM(z)."""
    def cut(z):
        m_flat = dist.dm(z) - 2.5 * np.log10(1.0 + z)
        m_j = np.minimum(mag_limit - _BAND_MINUS_J_MIN - m_flat,
                         abs_mag_faint - _UV_MINUS_J_MIN)
        return m_j - J_MINUS_K_AB
    return cut
