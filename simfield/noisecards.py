"""How a mosaic's files state the noise of apertures, and how a reader applies it.

A drizzled mosaic's pixels are correlated (each detector pixel's drop lands on several mosaic
pixels, and inter-pixel capacitance spreads the shot noise over neighbouring detector pixels),
so the noise of a sum over N pixels is larger than sqrt(sum of the pixel variances). The
per-pixel inverse variance map stays exact per pixel; its header carries, for apertures of
several radii, the factor

    F(r) = noise of the sum over a circular aperture of radius r
           / sqrt(the same aperture's sum of 1 / INVVAR)

and the limit F(inf) for large areas (Casertano et al. 2000, AJ 120, 2747, appendix A, for the
drizzle part). The error of an aperture sum is then F(r) sqrt(sum 1 / INVVAR); for any other
footprint of area A use the radius sqrt(A / pi).

This module only writes and reads those header cards; :mod:`simfield.survey.noise` computes F.
"""

from __future__ import annotations

import numpy as np

__all__ = ["noise_cards", "read_noise_factors", "noise_factor"]

_RAD = "APNR{:02d}"
_FAC = "APNF{:02d}"
_INF = "APNFINF"


def noise_cards(radii_pix, factors, factor_inf: float) -> list[tuple[str, float, str]]:
    """(key, value, comment) header cards of the aperture noise table.

    Parameters
    ----------
    radii_pix : sequence of float (mosaic pixels)
    factors : sequence of float (dimensionless)
        F(r) at each radius.
    factor_inf : float (dimensionless)
        F for large areas.
    """
    cards = [("APNDESC", "aperture noise = APNF x sqrt(sum 1/INVVAR)", "see README")]
    for i, (r, f) in enumerate(zip(radii_pix, factors), start=1):
        cards.append((_RAD.format(i), round(float(r), 4), "[pix] aperture radius"))
        cards.append((_FAC.format(i), round(float(f), 4), "noise factor at that radius"))
    cards.append((_INF, round(float(factor_inf), 4), "noise factor for large areas"))
    return cards


def read_noise_factors(header) -> tuple[np.ndarray, np.ndarray, float] | None:
    """(radii in pixels, factors, large-area factor) from a header, or None if it has none."""
    radii, facs = [], []
    i = 1
    while _RAD.format(i) in header and _FAC.format(i) in header:
        radii.append(float(header[_RAD.format(i)]))
        facs.append(float(header[_FAC.format(i)]))
        i += 1
    if not radii or _INF not in header:
        return None
    return np.asarray(radii), np.asarray(facs), float(header[_INF])


def noise_factor(table, radius_pix) -> np.ndarray:
    """F at ``radius_pix`` (mosaic pixels; scalar or array) from a :func:`read_noise_factors`
    table: interpolated in radius, 1 below the first radius' factor's reach (a single pixel has
    F = 1), the large-area factor beyond the last radius. ``table`` None gives 1 (no
    correlation stated)."""
    r = np.asarray(radius_pix, float)
    if table is None:
        return np.ones_like(r)
    radii, facs, f_inf = table
    xs = np.concatenate([[np.sqrt(1 / np.pi)], radii])  # one pixel's area: F = 1
    ys = np.concatenate([[1.0], facs])
    out = np.interp(r, xs, ys, left=1.0, right=facs[-1])
    # beyond the table, approach the large-area factor as the edge share falls ~ 1/r
    far = r > radii[-1]
    if np.any(far):
        out = np.where(far, f_inf + (facs[-1] - f_inf) * radii[-1] / np.where(far, r, 1.0), out)
    return out
