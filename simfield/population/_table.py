"""Assembling the SOURCES table from the families of one population draw.

Every family gives the columns it has; the others take the family-independent defaults of
:data:`POINT_DEFAULTS` (point sources) or :data:`GALAXY_DEFAULTS`. Units: see
``lightcone.COLUMN_UNITS`` and :mod:`simfield.columns`.
"""

from __future__ import annotations

import numpy as np
from astropy.table import Column, Table

from .lines import LINE_NAMES

__all__ = ["FLOAT_COLUMNS", "POINT_DEFAULTS", "GALAXY_DEFAULTS", "galaxy_columns",
           "stack_families"]

#: Float columns after the band magnitudes, in table order.
FLOAT_COLUMNS = ("r_half", "r_half_kpc", "sersic_n", "axis_ratio", "position_angle", "beta_uv",
                 "beta_opt", "break_strength", "knot_fraction", "teff", "spectral_type",
                 "dust_av", "ew_halpha", "ew_oiii_hbeta", "ew_oii")
_NAN = float("nan")
POINT_DEFAULTS = {"redshift": 0.0, "abs_mag_uv": _NAN, "r_half": 0.0, "r_half_kpc": 0.0,
                  "sersic_n": _NAN, "axis_ratio": 1.0, "position_angle": 0.0, "beta_uv": _NAN,
                  "beta_opt": _NAN, "break_strength": _NAN, "knot_fraction": 0.0,
                  "teff": _NAN, "spectral_type": _NAN, "dust_av": _NAN, "ew_halpha": _NAN,
                  "ew_oiii_hbeta": _NAN, "ew_oii": _NAN, "n_knots": 0, "knot_seed": 0}
GALAXY_DEFAULTS = {**POINT_DEFAULTS, "dust_av": 0.0, "ew_halpha": 0.0, "ew_oiii_hbeta": 0.0,
                   "ew_oii": 0.0}
_I_OII, _I_HB, _I_O3A, _I_O3B = (LINE_NAMES.index(n) for n in
                                 ("oii_3727", "hbeta", "oiii_4959", "oiii_5007"))


def galaxy_columns(phot, z, m_uv, beta, beta_opt, brk, morph, ew_halpha, dust_av=None):
    """Columns of a galaxy family (dict of arrays; magnitudes separately).

    ``ew_halpha`` (Angstrom) gives ew_oiii_hbeta (Hbeta + [OIII] 495.9 + 500.7) and ew_oii
    through the line model of ``phot`` (all 0 when it is off).
    """
    n = len(z)
    ew_ha = np.asarray(ew_halpha, dtype=float)
    if phot.lines is not None and n:
        ews = phot.line_ews(ew_ha, np.asarray(beta, float), np.asarray(brk, float),
                            np.asarray(beta_opt, float))
    else:
        ews = np.zeros((n, len(LINE_NAMES)))
        ew_ha = np.zeros(n)
    cols = {"redshift": z, "abs_mag_uv": m_uv, "r_half": morph.r_half,
            "r_half_kpc": morph.r_half_kpc, "sersic_n": morph.sersic_n,
            "axis_ratio": morph.axis_ratio, "position_angle": morph.position_angle,
            "beta_uv": beta, "beta_opt": beta_opt, "break_strength": brk,
            "knot_fraction": morph.knot_fraction, "n_knots": morph.n_knots,
            "knot_seed": morph.knot_seed, "ew_halpha": ew_ha,
            "ew_oiii_hbeta": ews[:, _I_HB] + ews[:, _I_O3A] + ews[:, _I_O3B],
            "ew_oii": ews[:, _I_OII]}
    if dust_av is not None:
        cols["dust_av"] = dust_av
    return cols


def stack_families(families, bands, x, y) -> Table:
    """One table from ``families``: a list of (kind, template, n, mags (n, n_band), columns,
    defaults); ``x``, ``y`` (arcsec) in the same order. ``template`` is a string or an array."""
    def col(name, dtype=float):
        return np.concatenate([np.broadcast_to(np.asarray(c.get(name, d[name]), dtype), (n,))
                               for _, _, n, _, c, d in families]) if families else \
            np.zeros(0, dtype)

    t = Table()
    n_all = sum(f[2] for f in families)
    t["id"] = np.arange(1, n_all + 1, dtype=np.int64)
    t["kind"] = np.concatenate([np.full(f[2], f[0]) for f in families]).astype("U9")
    t["x_arcsec"] = x
    t["y_arcsec"] = y
    t["redshift"] = col("redshift")
    t["abs_mag_uv"] = col("abs_mag_uv")
    mags = np.concatenate([f[3] for f in families]) if families else np.zeros((0, len(bands)))
    for i, b in enumerate(bands):
        t[f"mag_{b.name}"] = Column(mags[:, i], unit="mag")
    for name in FLOAT_COLUMNS[:8]:
        t[name] = col(name)
    t["template"] = np.concatenate([np.broadcast_to(np.asarray(f[1]), (f[2],))
                                    for f in families]).astype("U11")
    t["knot_fraction"] = col("knot_fraction")
    t["n_knots"] = col("n_knots", np.int32)
    t["knot_seed"] = col("knot_seed", np.int64)
    for name in FLOAT_COLUMNS[9:]:
        t[name] = col(name)
    return t
