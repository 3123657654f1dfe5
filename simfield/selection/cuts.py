"""Applying a sample's conditions to a multi-band photometry table (vectorised).

Magnitudes are AB, m = 31.4 - 2.5 log10(f / nJy) (Oke & Gunn 1983, ApJ 266, 713). In a colour
m_a - m_b, band a's flux is replaced by ``limit_sigma`` x its error where its S/N is below
``limit_sigma`` (the N-sigma upper limit, common practice), so a dropout colour is a lower
limit; a band b flux <= 0 makes the colour undefined and the condition fail. S/N = flux /
flux_err per band. Photometric-redshift conditions read ``p_gt_<z_cut>`` (``.`` written ``p``).

Units: fluxes and errors in nJy, magnitudes and colours in AB mag.
"""

from __future__ import annotations

import numpy as np

from ..bands import AB_NJY_ZERO
from ..errors import CatalogError

__all__ = ["pz_column", "needed_columns", "check_columns", "condition_mask", "apply_sample",
           "apply_samples"]


def pz_column(z_cut: float) -> str:
    """Name of the P(z > z_cut) column of ``photoz.fits``: ``p_gt_6p5`` for 6.5."""
    return "p_gt_" + f"{float(z_cut):g}".replace(".", "p")


def needed_columns(sample) -> list[str]:
    """Photometry (and photo-z) columns the conditions of ``sample`` read."""
    cols = []
    for c in sample.conditions:
        if c.kind in ("colour", "snr"):
            for b in list(c.bands) + list(c.slope_bands):
                cols += [f"flux_{b}", f"flux_err_{b}"]
        elif c.kind == "photoz":
            cols.append(pz_column(c.z_cut))
    return list(dict.fromkeys(cols))


def check_columns(table, samples, what: str = "photometry") -> None:
    """Refuse (:class:`CatalogError`, one line) a table lacking a column a sample needs."""
    have = set(table.colnames)
    for s in samples:
        miss = [c for c in needed_columns(s) if c not in have]
        if miss:
            raise CatalogError(f"{what} lacks column {miss[0]!r} needed by sample {s.name!r}; "
                               f"available: {', '.join(table.colnames)}")


def _flux(table, band):
    return (np.asarray(table[f"flux_{band}"], float),
            np.asarray(table[f"flux_err_{band}"], float))


def _mag(f):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(f > 0, AB_NJY_ZERO - 2.5 * np.log10(np.where(f > 0, f, 1.0)), np.nan)


def _colour(table, a, b, limit_sigma):
    fa, ea = _flux(table, a)
    fb, _ = _flux(table, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        low = ~(fa / ea >= limit_sigma)
    fa = np.where(low, limit_sigma * ea, fa)
    return _mag(fa) - _mag(fb)


def _bounds(x, above, below):
    ok = np.isfinite(x)
    if above is not None:
        ok &= x > above
    if below is not None:
        ok &= x < below
    return ok


def condition_mask(table, c, selected_by: dict | None = None) -> np.ndarray:
    """Whether each row meets condition ``c`` (a :class:`simfield.config.ConditionConfig`).

    Parameters
    ----------
    table : Table
        ``flux_<b>``, ``flux_err_<b>`` (nJy) per band, ``p_gt_<c>`` for photo-z conditions.
    c : ConditionConfig
    selected_by : dict {sample name: ndarray of bool}, optional
        Masks of other samples, for ``exclude`` conditions.

    Returns
    -------
    ndarray of bool
    """
    n = len(table)
    if c.kind == "colour":
        col = _colour(table, c.bands[0], c.bands[1], c.limit_sigma)
        if c.slope_bands:
            col = col - c.slope * _colour(table, c.slope_bands[0], c.slope_bands[1],
                                          c.limit_sigma)
        return _bounds(col, c.above, c.below)
    if c.kind == "snr":
        ok = np.ones(n, bool)
        for b in c.bands:
            f, e = _flux(table, b)
            with np.errstate(divide="ignore", invalid="ignore"):
                ok &= _bounds(f / e, c.above, c.below)
        return ok
    if c.kind == "photoz":
        p = np.asarray(table[pz_column(c.z_cut)], float)
        return np.isfinite(p) & (p >= c.above)
    if c.kind == "exclude":
        if selected_by is None or c.sample not in selected_by:
            raise CatalogError(f"exclude condition names sample {c.sample!r}, not evaluated yet")
        return ~np.asarray(selected_by[c.sample], bool)
    raise CatalogError(f"condition kind {c.kind!r} is not one of colour, snr, photoz, exclude")


def apply_sample(table, sample, selected_by: dict | None = None):
    """Selected mask of a sample and the first condition each row fails.

    Parameters
    ----------
    table : Table
        Photometry (nJy), joined with photo-z columns where a condition needs them.
    sample : SampleConfig
    selected_by : dict, optional
        Masks of the samples its ``exclude`` conditions name.

    Returns
    -------
    selected : ndarray of bool
    first_failed : ndarray of int
        Index of the first condition a row fails, -1 where selected.
    """
    n = len(table)
    first = np.full(n, -1, np.int64)
    for j, c in enumerate(sample.conditions):
        ok = condition_mask(table, c, selected_by)
        first[(first < 0) & ~ok] = j
    return first < 0, first


def apply_samples(table, samples) -> dict:
    """:func:`apply_sample` for every sample, samples named by ``exclude`` conditions first.

    Returns
    -------
    dict {name: (selected, first_failed)}
    """
    plain = [s for s in samples if all(c.kind != "exclude" for c in s.conditions)]
    rest = [s for s in samples if s not in plain]
    out = {}
    for s in plain + rest:
        out[s.name] = apply_sample(table, s, {k: v[0] for k, v in out.items()})
    return {s.name: out[s.name] for s in samples}
