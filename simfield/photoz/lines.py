"""Nebular emission lines added to a template continuum (a simple, cheap option).

Lines and their share of the rest equivalent width W of the [OIII] + H beta complex (ratios
fixed, project choice in the range of strong line emitters, common practice): [OIII] 500.7 nm
0.6 W, [OIII] 495.9 nm 0.2 W (the 3:1 doublet ratio of atomic physics), H beta 486.1 nm 0.2 W,
H alpha 656.3 nm 0.6 W, [OII] 372.7 nm 0.15 W.

A line of rest equivalent width W_j at lambda_j adds f_nu,c (W_j / lambda_j) G(ln lambda -
ln lambda_j) to the continuum f_nu,c, with G a unit-area Gaussian in ln lambda of width
:data:`LINE_WIDTH_LN` (this holds to O(width) for f_nu or f_lambda; the width only has to be
sampled by the wavelength grid, 1/200 in ln lambda, and is far narrower than any band, so band
fluxes do not depend on it).

Units: wavelengths and equivalent widths in nm (rest frame).
"""

from __future__ import annotations

import numpy as np

__all__ = ["LINES_NM", "LINE_SHARES", "LINE_WIDTH_LN", "add_lines"]

#: [OIII] 500.7, [OIII] 495.9, H beta, H alpha, [OII] 372.7 (nm, rest, air).
LINES_NM = np.array([500.7, 495.9, 486.1, 656.3, 372.7])
#: Equivalent width of each line over that of the [OIII] + H beta complex.
LINE_SHARES = np.array([0.6, 0.2, 0.2, 0.6, 0.15])
#: Gaussian sigma of every line in ln lambda (1.6 steps of the band wavelength grid).
LINE_WIDTH_LN = 0.008


def add_lines(wave_rest_nm, fnu_continuum, ew_complex_nm):
    """Continuum plus lines (same units as ``fnu_continuum``).

    Parameters
    ----------
    wave_rest_nm : array_like (nm)
        Rest wavelengths, broadcast with the other arguments.
    fnu_continuum : array_like (any f_nu unit)
        Continuum f_nu at ``wave_rest_nm``.
    ew_complex_nm : array_like (nm)
        Rest equivalent width of [OIII] 495.9 + 500.7 + H beta.
    """
    lnw = np.log(np.asarray(wave_rest_nm, dtype=float))
    ew = np.asarray(ew_complex_nm, dtype=float)
    norm = 1.0 / (np.sqrt(2.0 * np.pi) * LINE_WIDTH_LN)
    boost = np.zeros(np.broadcast_shapes(lnw.shape, ew.shape))
    for lam_j, share in zip(LINES_NM, LINE_SHARES):
        g = norm * np.exp(-0.5 * ((lnw - np.log(lam_j)) / LINE_WIDTH_LN) ** 2)
        boost = boost + ew * share / lam_j * g
    return np.asarray(fnu_continuum) * (1.0 + boost)
