"""Galaxy spectra: a broken power-law continuum, a 4000 A/Balmer break, IGM absorption.

Rest-frame continuum in f_lambda (wavelengths lambda in nm, rest frame):

    lambda <= 380 nm        f_lambda ~ lambda^beta              (rest-UV slope beta)
    380 < lambda <= 1200 nm  f_lambda ~ lambda^beta_opt          (rest-optical slope)
    1200 < lambda <= 2200 nm f_lambda ~ lambda^-2.06             (near infrared, J to K)
    lambda > 2200 nm         f_lambda ~ lambda^-3.42             (beyond K)

multiplied by a smooth step of height ``break_strength`` centred at 380 nm (the Balmer/4000 A
break: ratio of the flux density just redward to just blueward, logistic in ln lambda with
10-90 % width ~0.1 in ln lambda) and by ``lyc_escape`` below the Lyman limit (91.18 nm; ionising
photons are mostly absorbed inside the galaxy). The three slopes and the break are a project
template (common practice for broad-band colours), not a stellar-population synthesis.
The two near-infrared slopes give the rest-frame AB colours of galaxies, which differ little
between types there (light of cool giants): J - K = :data:`J_MINUS_K_AB` (f_nu nearly flat)
and K - 3.6 um = :data:`K_MINUS_3P6_AB` (the Rayleigh-Jeans-like fall beyond K).

Two template families (:func:`draw_sed_parameters`): star-forming galaxies with the
UV-slope relation of Bouwens et al. 2014, ApJ 793, 115 (table 3, [mem]) and a weak break, and
evolved galaxies with a red UV slope and a strong break. The probability of "evolved" falls with
redshift and with UV luminosity (quiescent galaxies are rare among UV-luminous sources; the
quiescent fraction drops steeply beyond z ~ 2, e.g. Muzzin et al. 2013, ApJ 777, 18 [mem]);
:func:`evolved_probability` serves the uniform (injection) mode and :func:`draw_sed_parameters`:
the light cone takes its evolved galaxies from the rest-K function instead (:mod:`.restk`).

Intergalactic absorption: Madau 1995, ApJ 441, 18 (eqs. 12-15 and footnote 3), see
:func:`igm_transmission`. Normalisation: the rest-1500 A absolute AB magnitude is M_UV, i.e. the
observed f_nu at 150 (1+z) nm (before IGM) has m = M_UV + DM(z) - 2.5 log10(1 + z).

Units: wavelengths in nm, flux densities f_nu in nJy, magnitudes AB.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..bands import AB_NJY_ZERO, Band
from ..cosmo import distance_modulus

__all__ = [
    "LYMAN_SERIES_NM",
    "MADAU_COEFFICIENTS",
    "LYMAN_LIMIT_NM",
    "J_MINUS_K_AB",
    "K_MINUS_3P6_AB",
    "SEDParameters",
    "igm_transmission",
    "rest_fnu_shape",
    "galaxy_fnu",
    "band_magnitudes",
    "band_weight_matrix",
    "band_colours",
    "wave_grid",
    "uv_slope_relation",
    "BETA_SCATTER",
    "SF_OPT_OFFSET",
    "SF_BREAK",
    "sf_beta_opt",
    "evolved_probability",
    "sed_parameters_from_deviates",
    "draw_sed_parameters",
]

#: Lyman alpha, beta, gamma, delta rest wavelengths (nm).
LYMAN_SERIES_NM = np.array([121.567, 102.572, 97.254, 94.974])
#: Madau 1995 eq. 12/15 line-blanketing coefficients A_j for the lines above.
MADAU_COEFFICIENTS = np.array([3.6e-3, 1.7e-3, 1.2e-3, 9.3e-4])
#: Lyman limit (nm).
LYMAN_LIMIT_NM = 91.18

_UV_REF_NM = 150.0  # M_UV is defined at rest 1500 A
_BREAK_NM = 380.0
_NIR_KNEE_NM = 1200.0
_K_NM = 2200.0
#: Rest-frame J - K of galaxies in AB (mag): ~0.9 in Vega (local galaxies, e.g. Jarrett et al.
#: 2003, AJ 125, 525 [from memory]) with AB - Vega = 0.91 (J) and 1.85 (K) (Blanton & Roweis
#: 2007, AJ 133, 734 [from memory]): -0.04.
J_MINUS_K_AB = -0.04
#: Rest-frame K - 3.6 um of galaxies in AB (mag): ~0.2 in Vega [from memory] with AB - Vega =
#: 1.85 (K) and 2.79 at 3.6 um (Vega 281 Jy [from memory]): -0.74.
K_MINUS_3P6_AB = -0.74
# f_lambda slopes: m_a - m_b = 2.5 (slope + 2) log10(lambda_b / lambda_a) (f_nu = f_lambda
# lambda^2 / c); -2.06 from 1200 to 2200 nm, -3.42 beyond
_NIR_SLOPE = -2.0 + J_MINUS_K_AB / (2.5 * np.log10(_K_NM / _NIR_KNEE_NM))
_FIR_SLOPE = -2.0 + K_MINUS_3P6_AB / (2.5 * np.log10(3550.0 / _K_NM))
# logistic width in ln(lambda): 10-90 % rise over 2 ln 9 w = 4.39 w ~ 0.1
_BREAK_WIDTH = 0.023


def igm_transmission(wave_obs_nm, z):
    """Mean intergalactic transmission exp(-tau) of Madau 1995, ApJ 441, 18.

    Lyman series (eq. 12, 15): tau_j = A_j (lambda_obs / lambda_j)^3.46 for
    lambda_j < lambda_obs < lambda_j (1 + z), with A_j = 3.6e-3, 1.7e-3, 1.2e-3, 9.3e-4 for
    Ly alpha ... delta. Photoelectric absorption by the Lyman continuum of intervening systems
    (footnote 3 of the paper), for lambda_obs < 91.18 (1 + z) nm with x_c = lambda_obs / 91.18 nm
    and x_em = 1 + z:

        tau_c = 0.25 x_c^3 (x_em^0.46 - x_c^0.46) + 9.4 x_c^1.5 (x_em^0.18 - x_c^0.18)
                - 0.7 x_c^3 (x_c^-1.32 - x_em^-1.32) - 0.023 (x_em^1.68 - x_c^1.68)

    Parameters
    ----------
    wave_obs_nm : float or array_like (nm)
        Observed wavelengths, shape (n_wave,) or broadcastable with ``z``.
    z : float or array_like
        Source redshifts. A 1-D ``z`` of length n_gal with a 1-D wavelength array gives an
        (n_gal, n_wave) result.

    Returns
    -------
    ndarray (dimensionless)
        Transmission in [0, 1].
    """
    return np.exp(-_igm_tau(wave_obs_nm, z))


def _igm_tau(wave_obs_nm, z):
    """Optical depth of :func:`igm_transmission`. Powers of lambda and of (1 + z) are taken on
    their own 1-D arrays; only sums and products are done on the (n_gal, n_wave) grid."""
    lam = np.asarray(wave_obs_nm, dtype=float)
    zz = np.asarray(z, dtype=float)
    if zz.ndim == 1 and lam.ndim == 1:
        zz = zz[:, None]
        lam = lam[None, :]
    opz = 1.0 + zz
    tau = np.zeros(np.broadcast_shapes(lam.shape, opz.shape))
    for lam_j, a_j in zip(LYMAN_SERIES_NM, MADAU_COEFFICIENTS):
        inside = (lam > lam_j) & (lam < lam_j * opz)
        tau += np.where(inside, a_j * (lam / lam_j) ** 3.46, 0.0)
    xc = np.maximum(lam / LYMAN_LIMIT_NM, 1.0)
    xc3, xc15 = xc**3, xc**1.5
    tau_c = (0.25 * xc3 * opz**0.46 - 0.25 * xc**3.46 + 9.4 * xc15 * opz**0.18
             - 9.4 * xc**1.68 - 0.7 * xc**1.68 + 0.7 * xc3 * opz**-1.32
             - 0.023 * opz**1.68 + 0.023 * xc**1.68)
    tau += np.where(lam < LYMAN_LIMIT_NM * opz, np.maximum(tau_c, 0.0), 0.0)
    return tau


def rest_fnu_shape(wave_rest_nm, beta, break_strength, beta_opt, lyc_escape=0.0):
    """Rest-frame f_nu of the template, normalised to 1 at 150 nm (dimensionless).

    Parameters
    ----------
    wave_rest_nm : array_like (nm)
        Rest wavelengths; broadcast with the other arguments.
    beta : array_like
        Rest-UV slope (f_lambda ~ lambda^beta) below 380 nm.
    break_strength : array_like
        Flux-density ratio across the 380 nm break (>= 1 for a break).
    beta_opt : array_like
        Rest-optical slope (f_lambda ~ lambda^beta_opt) between 380 and 1200 nm.
    lyc_escape : float or array_like
        Fraction of the continuum kept below 91.18 nm.
    """
    return np.exp(_ln_rest_fnu_shape(np.log(np.asarray(wave_rest_nm, dtype=float)), beta,
                                     break_strength, beta_opt, lyc_escape))


def _ln_rest_fnu_shape(lnl, beta, break_strength, beta_opt, lyc_escape):
    """ln of :func:`rest_fnu_shape` at ln(rest wavelength / nm) ``lnl``."""
    beta = np.asarray(beta, dtype=float)
    beta_opt = np.asarray(beta_opt, dtype=float)
    ln_ref, ln_b, ln_k = np.log(_UV_REF_NM), np.log(_BREAK_NM), np.log(_NIR_KNEE_NM)
    ln_kk = np.log(_K_NM)
    # ln f_lambda relative to 150 nm; the segments join continuously
    u = np.minimum(lnl, ln_b) - ln_ref
    o = np.clip(lnl, ln_b, ln_k) - ln_b
    r = np.clip(lnl, ln_k, ln_kk) - ln_k
    f = np.maximum(lnl, ln_kk) - ln_kk
    step = 1.0 / (1.0 + np.exp(-(lnl - ln_b) / _BREAK_WIDTH))
    # 2 (lnl - ln_ref): f_nu = f_lambda lambda^2 / c; the step is ~1e-40 at 150 nm
    ln_fnu = (beta + 2.0) * u + (beta_opt + 2.0) * o + (_NIR_SLOPE + 2.0) * r \
        + (_FIR_SLOPE + 2.0) * f + np.log(np.asarray(break_strength, dtype=float)) * step
    with np.errstate(divide="ignore"):
        ln_lyc = np.log(lyc_escape)
    return np.where(lnl < np.log(LYMAN_LIMIT_NM), ln_fnu + ln_lyc, ln_fnu)


def galaxy_fnu(wave_nm, z, abs_mag_uv, beta, break_strength, beta_opt, igm=True,
               lyc_escape=0.0, cosmo=None, dist_mod=None):
    """Observed f_nu of galaxies on an observed wavelength grid (nJy).

    Parameters
    ----------
    wave_nm : array_like (nm), shape (n_wave,)
        Observed wavelengths.
    z : array_like, shape (n_gal,)
        Redshifts.
    abs_mag_uv : array_like (AB mag), shape (n_gal,)
        Rest-1500 A absolute magnitudes.
    beta, break_strength, beta_opt : array_like, shape (n_gal,)
        Template parameters (see :func:`rest_fnu_shape`).
    igm : bool
        Apply :func:`igm_transmission`.
    lyc_escape : float
        Fraction of the continuum kept below the rest Lyman limit.
    cosmo : astropy cosmology, optional
    dist_mod : array_like (mag), shape (n_gal,), optional
        Distance moduli DM(z) if already known (else computed with ``cosmo``).

    Returns
    -------
    ndarray (nJy), shape (n_gal, n_wave)
    """
    lnw = np.log(np.asarray(wave_nm, dtype=float))
    z = np.atleast_1d(np.asarray(z, dtype=float))
    col = lambda a: np.atleast_1d(np.asarray(a, dtype=float))[:, None]  # noqa: E731
    dm = distance_modulus(z, cosmo) if dist_mod is None else np.asarray(dist_mod, dtype=float)
    m_1500 = np.asarray(abs_mag_uv, dtype=float) + dm - 2.5 * np.log10(1.0 + z)
    ln_f1500 = -0.4 * np.log(10.0) * (m_1500 - AB_NJY_ZERO)  # ln(f_nu / nJy) at 150 (1+z) nm
    ln_f = _ln_rest_fnu_shape(lnw[None, :] - np.log1p(z)[:, None], col(beta),
                              col(break_strength), col(beta_opt), lyc_escape)
    ln_f += ln_f1500[:, None]
    if igm:
        # only sources whose Lyman alpha lands redward of the grid's blue end are absorbed
        rows = np.flatnonzero(LYMAN_SERIES_NM[0] * (1.0 + z) > np.exp(lnw.min()))
        if rows.size:
            ln_f[rows] -= _igm_tau(np.exp(lnw), z[rows])
    return np.exp(ln_f)


def wave_grid(bands: Sequence[Band], dlnlam: float = 1.0 / 200.0) -> np.ndarray:
    """Observed wavelength grid covering every band, uniform in ln lambda (nm).

    Parameters
    ----------
    bands : sequence of Band
    dlnlam : float
        Step in ln(lambda); 1/200 puts ~50 samples across a 25 % wide band (a break inside
        the band is then placed to ~1 % of the band's flux).
    """
    parts = []
    for b in bands:
        lo, hi = float(b.wave[0]), float(b.wave[-1])
        n = max(8, int(np.ceil(np.log(hi / lo) / dlnlam)) + 1)
        parts.append(np.exp(np.linspace(np.log(lo), np.log(hi), n)))
    return np.unique(np.concatenate(parts))


def band_weight_matrix(wave_nm, bands: Sequence[Band]) -> np.ndarray:
    """Synthetic-photometry weights, shape (n_wave, n_band): <f_nu> = f_nu @ W."""
    return np.column_stack([b.weights(np.asarray(wave_nm, dtype=float)) for b in bands])


def band_colours(fnu_of_wave, bands: Sequence[Band], ref: int) -> np.ndarray:
    """Band magnitudes relative to band ``ref`` (AB mag), shape (n, n_band), of the spectra
    ``fnu_of_wave(wave_nm) -> (n, n_wave)`` (any f_nu units) on the bands' own wavelengths."""
    wave = np.unique(np.concatenate([b.wave for b in bands]))
    f = fnu_of_wave(wave) @ band_weight_matrix(wave, bands)
    return -2.5 * np.log10(f / f[:, ref:ref + 1])


def band_magnitudes(wave_nm, fnu, bands: Sequence[Band], weights=None) -> np.ndarray:
    """AB magnitudes of spectra through bands by synthetic photometry.

    Parameters
    ----------
    wave_nm : array_like (nm), shape (n_wave,)
    fnu : array_like (nJy), shape (n_gal, n_wave) or (n_wave,)
    bands : sequence of Band
    weights : ndarray, optional
        Precomputed :func:`band_weight_matrix` for ``wave_nm``.

    Returns
    -------
    ndarray (AB mag), shape (n_gal, n_band)
        +inf where the band flux is zero.
    """
    w = band_weight_matrix(wave_nm, bands) if weights is None else weights
    f = np.atleast_2d(np.asarray(fnu, dtype=float)) @ w
    with np.errstate(divide="ignore"):
        return np.where(f > 0, AB_NJY_ZERO - 2.5 * np.log10(np.where(f > 0, f, 1.0)), np.inf)


# --------------------------------------------------------------------------------------------
# template parameters
# --------------------------------------------------------------------------------------------
# Bouwens et al. 2014, ApJ 793, 115, table 3 [mem]: beta at M_UV = -19.5 and d beta / d M_UV.
# Below z = 2.5 the values are held to a local UV-selected value of -1.5 at z = 0 (common
# practice, approximate); above z = 8 beta keeps falling gently to -2.3 at z = 10 [project
# choice], constant beyond.
_BETA_Z = np.array([0.0, 2.5, 3.8, 5.0, 5.9, 7.0, 8.0, 10.0])
_BETA_195 = np.array([-1.50, -1.70, -1.85, -1.91, -2.00, -2.05, -2.13, -2.30])
_BETA_SLOPE = np.array([-0.20, -0.20, -0.11, -0.14, -0.20, -0.20, -0.15, -0.15])
#: Intrinsic scatter of beta at fixed M_UV and z (~0.35, Bouwens et al. 2014 [mem]).
BETA_SCATTER = 0.35
#: Star-forming template: rest-optical slope beta_opt = clip(beta + SF_OPT_OFFSET, -2.2, 0.5)
#: and median break SF_BREAK (common practice; bluer than the SDSS blue cloud at z ~ 0.1, and
#: why they are kept: tests/test_population.py, test_sdss_anchored_star_forming_template_...)
SF_OPT_OFFSET = 0.8
SF_BREAK = 1.25


def sf_beta_opt(beta):
    """Mean rest-optical slope of the star-forming template at UV slope ``beta``:
    clip(beta + :data:`SF_OPT_OFFSET`, -2.2, 0.5) (:func:`sed_parameters_from_deviates` adds
    its scatter)."""
    return np.clip(np.asarray(beta, dtype=float) + SF_OPT_OFFSET, -2.2, 0.5)


def uv_slope_relation(z, abs_mag_uv):
    """Mean rest-UV slope beta(M_UV, z) of star-forming galaxies (Bouwens et al. 2014 [mem]).

    beta = beta_-19.5(z) + (d beta/d M)(z) (M_UV + 19.5), linearly interpolated in z.

    Parameters
    ----------
    z : array_like
    abs_mag_uv : array_like (AB mag)
    """
    z = np.asarray(z, dtype=float)
    b0 = np.interp(z, _BETA_Z, _BETA_195)
    db = np.interp(z, _BETA_Z, _BETA_SLOPE)
    return b0 + db * (np.asarray(abs_mag_uv, dtype=float) + 19.5)


def evolved_probability(z, abs_mag_uv, m_star):
    """Probability that a galaxy drawn by UV magnitude has an evolved template (the uniform
    injection mode; the light cone's rest-UV galaxies are all star-forming, :mod:`.lightcone`).

    p = 0.25 / (1 + ((1 + z) / 2.5)^4) exp(-(M_UV - M* - 1.5)^2 / (2 1.5^2)): the redshift
    factor is 0.24 at z = 0, 0.12 at z = 1.5, 0.03 at z = 3 and < 0.01 beyond z = 4; the
    magnitude factor peaks 1.5 mag below M* (massive quiescent galaxies are faint in the UV but
    not dwarfs, whose UV light is mostly from star formation) and is 0.14 at M* - 1.5 and at
    M* + 4.5 (project choice shaped by the trends cited in the module docstring).

    Parameters
    ----------
    z : array_like
    abs_mag_uv, m_star : array_like (AB mag)
        Rest-UV magnitude and the luminosity function's M* at z.
    """
    z = np.asarray(z, dtype=float)
    pz = 0.25 / (1.0 + ((1.0 + z) / 2.5) ** 4)
    dm = np.asarray(abs_mag_uv, dtype=float) - m_star - 1.5
    return pz * np.exp(-0.5 * (dm / 1.5) ** 2)


@dataclass(frozen=True)
class SEDParameters:
    """Template parameters of a set of galaxies (all arrays of length n_gal).

    Attributes
    ----------
    template : ndarray of str
        ``"starforming"`` or ``"evolved"``.
    beta : ndarray
        Rest-UV slope.
    beta_opt : ndarray
        Rest-optical slope.
    break_strength : ndarray
        Flux ratio across the 380 nm break.
    """

    template: np.ndarray
    beta: np.ndarray
    beta_opt: np.ndarray
    break_strength: np.ndarray


def sed_parameters_from_deviates(z, abs_mag_uv, evolved, deviates) -> SEDParameters:
    """Template parameters from given standard-normal ``deviates`` (shape (3, n), clipped to
    +-4), so that they can be recomputed for a changed M_UV with the same randomness.

    Star-forming: beta from :func:`uv_slope_relation` with Gaussian scatter
    :data:`BETA_SCATTER`, clipped to [-3.2, 0.5]; beta_opt = clip(beta + 0.8, -2.2, 0.5) + N(0,
    0.15) (UV-to-optical colours of ~0.6-2.5 mag, common practice); break ~ 1.25 (0.08 dex).
    Evolved: beta ~ N(1.0, 0.4) in [0, 2]; beta_opt ~ N(-0.7, 0.2); break ~ N(1.9, 0.2) in
    [1.4, 2.6] (D4000 of old populations ~1.6-2.2, common practice).

    Parameters
    ----------
    z : array_like
    abs_mag_uv : array_like (AB mag)
    evolved : array_like of bool
    deviates : ndarray, shape (3, n)
    """
    evolved = np.asarray(evolved, dtype=bool)
    g = np.clip(np.asarray(deviates, dtype=float), -4.0, 4.0)
    b_sf = np.clip(uv_slope_relation(z, abs_mag_uv) + BETA_SCATTER * g[0], -3.2, 0.5)
    bo_sf = sf_beta_opt(b_sf) + 0.15 * g[1]
    br_sf = 10.0 ** (np.log10(SF_BREAK) + 0.08 * g[2])
    b_ev = np.clip(1.0 + 0.4 * g[0], 0.0, 2.0)
    bo_ev = -0.7 + 0.2 * g[1]
    br_ev = np.clip(1.9 + 0.2 * g[2], 1.4, 2.6)
    return SEDParameters(
        template=np.where(evolved, "evolved", "starforming"),
        beta=np.where(evolved, b_ev, b_sf),
        beta_opt=np.where(evolved, bo_ev, bo_sf),
        break_strength=np.maximum(np.where(evolved, br_ev, br_sf), 1.0),
    )


def draw_sed_parameters(z, abs_mag_uv, m_star, rng: np.random.Generator,
                        evolved=None) -> SEDParameters:
    """Draw templates (probability :func:`evolved_probability`) and their parameters
    (:func:`sed_parameters_from_deviates`).

    Parameters
    ----------
    z : array_like
    abs_mag_uv, m_star : array_like (AB mag)
    rng : numpy.random.Generator
    evolved : array_like of bool, optional
        Templates already chosen; then only the parameters are drawn.
    """
    z = np.atleast_1d(np.asarray(z, dtype=float))
    if evolved is None:
        evolved = rng.random(z.size) < evolved_probability(z, abs_mag_uv, m_star)
    return sed_parameters_from_deviates(z, abs_mag_uv, evolved, rng.standard_normal((3, z.size)))
