"""Template band fluxes on a redshift grid, built from the population's own spectral model.

A *family* is a callable ``family(wave_rest_nm) -> (names, fnu)`` returning the rest-frame
f_nu shapes of its templates on a rest-wavelength array of any shape (``fnu`` has shape
(n_templates, *wave_rest_nm.shape)), normalised to 1 at rest 150 nm *after* any attenuation
the family applies, so the fitted amplitude of every template is the observed f_nu at rest
1500 A (nJy, before intergalactic absorption). Families of this module:

- :func:`starforming_family`: :func:`~simfield.population.seds.rest_fnu_shape` over a grid of
  UV slopes beta with the population's mean rest-optical slope beta_opt = clip(beta + 0.8,
  -2.2, 0.5) and weak breaks around its 1.25 (:func:`~simfield.population.seds.\
  sed_parameters_from_deviates`; on noiseless population photometry the breaks 1.1, 1.25 and
  1.45 cut the outliers from 15 to 10 %);
- :func:`evolved_family`: red UV slope 1.0, beta_opt -0.7, breaks 1.6-2.2 (the population's
  evolved range);
- :func:`dusty_family`: a blue star-forming continuum (beta -2.2) behind Calzetti et al. 2000
  (ApJ 533, 682) attenuation for a grid of A_V (:mod:`simfield.photoz.dust`);
- :func:`balmer_family`: strong Balmer-break quiescent galaxies (breaks 2.6 and 3.2 on a
  moderately red UV continuum): at z ~ 3-5 they mimic a Lyman break at z ~ 12-18;
- :func:`line_family`: star-forming continua with nebular lines (:mod:`simfield.photoz.lines`).

Any further family (e.g. cool dwarfs) is one more callable in the list given to
:func:`build_templates`. Redshifting and the Madau 1995 (ApJ 441, 18) mean intergalactic
transmission are applied here, for every family alike.

Redshift grid (:func:`redshift_grid`): uniform in ln(1 + z). The bands are ~22 % wide
(FWHM / centre), so a break crosses a band over Delta ln(1+z) ~ 0.2; at S/N ~ 10 the
photometric-redshift scatter is ~0.03-0.05 (1 + z) (common practice), so a step of 0.01 in
ln(1 + z) (dz = 0.01 (1 + z)) samples the narrowest P(z) peaks with >= 3 points and a band
with ~20: 305 points from z = 0 to 20.

Units: wavelengths in nm, band fluxes in nJy per nJy of rest-1500 A f_nu.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from ..bands import Band
from ..population import seds
from ..population.seds import band_weight_matrix, igm_transmission, rest_fnu_shape, wave_grid
from .dust import attenuation_ratio
from .lines import add_lines

__all__ = [
    "Family",
    "TemplateSet",
    "redshift_grid",
    "starforming_family",
    "evolved_family",
    "dusty_family",
    "balmer_family",
    "line_family",
    "default_families",
    "build_templates",
]

#: ``family(wave_rest_nm) -> (names, fnu)``, fnu of shape (n_templates, *wave_rest_nm.shape).
Family = Callable[[np.ndarray], tuple[list[str], np.ndarray]]

_UV_NM = 150.0


def redshift_grid(z_min: float, z_max: float, dz_over_1pz: float) -> np.ndarray:
    """Redshifts uniform in ln(1 + z) from ``z_min`` to ``z_max`` with step <= dz_over_1pz.

    Parameters
    ----------
    z_min, z_max : float
        Ends of the grid (both included).
    dz_over_1pz : float
        Largest step in ln(1 + z), i.e. dz / (1 + z).

    Returns
    -------
    ndarray, shape (n_z,)
    """
    span = np.log1p(z_max) - np.log1p(z_min)
    n = int(np.ceil(span / dz_over_1pz - 1e-9)) + 1
    return np.expm1(np.linspace(np.log1p(z_min), np.log1p(z_max), n))


def _col(values, ndim):
    """``values`` as an (n, 1, ..., 1) array broadcasting against ``ndim`` wavelength axes."""
    return np.asarray(values, dtype=float).reshape((-1,) + (1,) * ndim)


def _continuum(wave_rest_nm, beta, break_strength, beta_opt):
    w = np.asarray(wave_rest_nm, dtype=float)
    return rest_fnu_shape(w[None], _col(beta, w.ndim), _col(break_strength, w.ndim),
                          _col(beta_opt, w.ndim))


def starforming_family(betas: Sequence[float], breaks: Sequence[float] | None = None) -> Family:
    """Star-forming templates for each UV slope in ``betas`` and each weak break in
    ``breaks`` (default: the population's median break,
    :data:`simfield.population.seds.SF_BREAK`, drawn with 0.08 dex scatter; see the module
    docstring)."""
    breaks = (seds.SF_BREAK,) if breaks is None else breaks
    b, k = (a.ravel() for a in np.meshgrid(np.asarray(betas, dtype=float),
                                           np.asarray(breaks, dtype=float), indexing="ij"))
    beta_opt = seds.sf_beta_opt(b)

    def family(wave_rest_nm):
        names = [f"starforming_beta{x:+.2f}_break{y:.2f}" for x, y in zip(b, k)]
        return names, _continuum(wave_rest_nm, b, k, beta_opt)

    return family


def evolved_family(breaks: Sequence[float] = (1.6, 1.9, 2.2)) -> Family:
    """Evolved templates: beta 1.0, beta_opt -0.7, one template per break strength."""
    breaks = np.asarray(breaks, dtype=float)

    def family(wave_rest_nm):
        names = [f"evolved_break{b:.2f}" for b in breaks]
        n = breaks.size
        return names, _continuum(wave_rest_nm, np.full(n, 1.0), breaks, np.full(n, -0.7))

    return family


def balmer_family(breaks: Sequence[float] = (2.6, 3.2), beta: float = 0.5,
                  beta_opt: float = -1.0) -> Family:
    """Strong Balmer-break quiescent templates (break 2.6-3.2 on a red UV slope)."""
    breaks = np.asarray(breaks, dtype=float)

    def family(wave_rest_nm):
        names = [f"balmer_break{b:.2f}" for b in breaks]
        n = breaks.size
        return names, _continuum(wave_rest_nm, np.full(n, beta), breaks, np.full(n, beta_opt))

    return family


def dusty_family(a_v: Sequence[float], beta: float = -2.2) -> Family:
    """Dusty star-forming templates: a beta = ``beta`` continuum (beta_opt = beta + 0.8, break
    1.25) times the Calzetti et al. 2000 attenuation of each A_V (mag) in ``a_v``, renormalised
    to 1 at rest 150 nm."""
    a_v = np.asarray(a_v, dtype=float)

    def family(wave_rest_nm):
        w = np.asarray(wave_rest_nm, dtype=float)
        base = _continuum(w, [beta], [seds.SF_BREAK], [seds.sf_beta_opt(beta)])
        names = [f"dusty_av{a:.2f}" for a in a_v]
        return names, base * attenuation_ratio(w[None], _col(a_v, w.ndim), _UV_NM)

    return family


def line_family(ew_oiii_hb_nm: Sequence[float], beta: float = -2.2) -> Family:
    """Star-forming continua (beta = ``beta``) with nebular lines of total rest equivalent
    width ``ew_oiii_hb_nm`` (nm) in [OIII] 495.9/500.7 + H beta (see :mod:`.lines`)."""
    ews = np.asarray(ew_oiii_hb_nm, dtype=float)

    def family(wave_rest_nm):
        w = np.asarray(wave_rest_nm, dtype=float)
        n = ews.size
        cont = _continuum(w, np.full(n, beta), np.full(n, seds.SF_BREAK),
                          np.full(n, seds.sf_beta_opt(beta)))
        names = [f"lines_ew{e:.0f}nm" for e in ews]
        return names, add_lines(w[None], cont, _col(ews, w.ndim))

    return family


def default_families(betas: Sequence[float], a_v: Sequence[float],
                     line_ew_nm: Sequence[float] = (),
                     sf_breaks: Sequence[float] = (1.1, 1.25, 1.45)) -> list[Family]:
    """The families of a run: star-forming (``betas`` x ``sf_breaks``), evolved, dusty
    (``a_v``, mag), strong Balmer break, and line emitters when ``line_ew_nm`` (nm) is not
    empty."""
    fams = [starforming_family(betas, sf_breaks), evolved_family(), dusty_family(a_v),
            balmer_family()]
    if len(line_ew_nm):
        fams.append(line_family(line_ew_nm))
    return fams


@dataclass(frozen=True)
class TemplateSet:
    """Template band fluxes on a redshift grid.

    Attributes
    ----------
    names : list of str
        Template names, length n_t.
    z : ndarray, shape (n_z,)
        Redshift grid.
    bands : list of str
        Band names, length n_b.
    flux : ndarray (nJy per nJy of rest-1500 A f_nu), shape (n_t, n_z, n_b)
        Photon-weighted mean f_nu in each band of a template at each redshift.
    """

    names: list[str]
    z: np.ndarray
    bands: list[str]
    flux: np.ndarray


def build_templates(bands: Sequence[Band], z: np.ndarray, families: Sequence[Family],
                    igm: bool = True) -> TemplateSet:
    """Band fluxes of every template of ``families`` at every redshift of ``z``.

    Parameters
    ----------
    bands : sequence of Band
    z : ndarray, shape (n_z,)
        Redshift grid (e.g. :func:`redshift_grid`).
    families : sequence of Family
    igm : bool
        Apply the Madau 1995 mean intergalactic transmission.

    Returns
    -------
    TemplateSet
    """
    z = np.asarray(z, dtype=float)
    wave = wave_grid(bands)
    weights = band_weight_matrix(wave, bands)  # (n_wave, n_b)
    rest = wave[None, :] / (1.0 + z[:, None])  # (n_z, n_wave)
    trans = igm_transmission(wave, z) if igm else 1.0
    names, fluxes = [], []
    for fam in families:
        fam_names, fnu = fam(rest)  # (n_t, n_z, n_wave)
        names.extend(fam_names)
        fluxes.append((fnu * trans) @ weights)
    return TemplateSet(names=names, z=z, bands=[b.name for b in bands],
                       flux=np.concatenate(fluxes, axis=0))
