"""Cool-dwarf star templates beside the galaxy fit: is an object better fitted as a star?

Cool M, L and T dwarfs are the classic contaminant of dropout samples: their near-infrared
colours mimic a Lyman break at z ~ 6-8. Stars have no redshift, so they do not enter P(z);
each object is fitted with every dwarf template of the population's own model
(:func:`simfield.population.dwarfs.dwarf_band_magnitudes`, spectral types M7 to T8) with the
best non-negative amplitude, and the smallest chi2 is written beside the galaxy fit's
(``chi2_star`` against ``chi2_best``; ``star_type`` the best type, M0 = 10, L0 = 20, T0 = 30).

Units: fluxes in nJy.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..bands import Band
from ..population.dwarfs import dwarf_band_magnitudes

__all__ = ["DWARF_TYPES", "dwarf_templates", "fit_stars"]

#: Spectral types of the dwarf templates (M7 ... T8 in steps of one subtype).
DWARF_TYPES = np.arange(17.0, 38.5, 1.0)


def dwarf_templates(bands: Sequence[Band], types=DWARF_TYPES) -> np.ndarray:
    """Band fluxes (relative, J-like band = 1) of each dwarf type, shape (n_types, n_bands)."""
    mags = dwarf_band_magnitudes(np.zeros(len(types)), np.asarray(types, float), bands)
    return 10.0 ** (-0.4 * mags)


def fit_stars(flux, flux_err, templates: np.ndarray, types=DWARF_TYPES):
    """Best dwarf template of every object.

    Parameters
    ----------
    flux, flux_err : ndarray (nJy), shape (n, n_bands)
        Bands with a NaN flux or a non-positive / non-finite error are left out.
    templates : ndarray, shape (n_types, n_bands)
        From :func:`dwarf_templates`.

    Returns
    -------
    chi2 : ndarray, shape (n,)
        Smallest chi2 over the types, each with its best amplitude >= 0.
    best_type : ndarray, shape (n,)
        Spectral type of that template.
    """
    f = np.asarray(flux, float)
    e = np.asarray(flux_err, float)
    ok = np.isfinite(f) & np.isfinite(e) & (e > 0)
    w = np.where(ok, 1.0 / np.where(ok, e, 1.0) ** 2, 0.0)
    f = np.where(ok, f, 0.0)
    t = np.asarray(templates, float)
    ft = (f * w) @ t.T  # (n, n_types)
    tt = w @ (t * t).T
    amp = np.clip(ft / np.where(tt > 0, tt, 1.0), 0.0, None)
    chi2 = (w * f * f).sum(axis=1)[:, None] - 2 * amp * ft + amp * amp * tt
    best = np.argmin(chi2, axis=1)
    return chi2[np.arange(len(f)), best], np.asarray(types, float)[best]
