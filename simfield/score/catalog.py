"""A user's detection catalogue: reading, column choice, checks of positions, duplicates and
magnitude scale.

``load_catalog`` reads a FITS, ECSV or CSV table and refuses what cannot be scored (missing or
non-numeric columns, NaN/inf, RA/Dec out of range, implausible magnitudes, positions off the
mosaic, duplicate rows); a column holding several values per row (e.g. one magnitude per
aperture) is chosen element-wise as ``NAME[i]`` (0-based). ``check_magnitude_scale`` compares,
after matching, the catalogue's magnitudes of bright isolated sources with their truth
magnitudes and refuses a catalogue whose fluxes are on another scale (a wrong unit or zero
point).

Units: RA/Dec in degrees, magnitudes AB, fluxes in the unit declared (:data:`FLUX_UNITS`).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from ..bands import AB_NJY_ZERO
from ..errors import CatalogError

__all__ = ["FLUX_UNITS", "DUPLICATE_ARCSEC", "MAG_OFFSET_MAX", "MAG_CHECK_MIN_PAIRS",
           "MAG_CHECK_PAIRS", "ISOLATION_ARCSEC", "parse_column", "resolve_columns",
           "load_catalog", "check_magnitude_scale"]

#: AB magnitude of unit flux in each accepted flux unit (m = ZP - 2.5 log10 f):
#: nJy 31.4, uJy 23.9, mJy 16.4, Jy 8.9 (Oke & Gunn 1983, ApJ 266, 713); e-/s needs the
#: mosaic's ZP_AB.
FLUX_UNITS = {"nJy": AB_NJY_ZERO, "uJy": AB_NJY_ZERO - 7.5, "mJy": AB_NJY_ZERO - 15.0,
              "Jy": AB_NJY_ZERO - 22.5, "e-/s": None}

# plausible range of AB magnitudes of real detections in a deep field (common practice)
_MAG_PLAUSIBLE = (5.0, 45.0)

#: rows closer than this (arcsec, 1 milliarcsec) are duplicates: far below any astrometric
#: precision, so two real detections never sit this close
DUPLICATE_ARCSEC = 1e-3

#: largest accepted median (catalogue - truth) magnitude of bright isolated matches (mag).
#: Aperture magnitudes of extended bright galaxies fall short of their total magnitudes by up
#: to ~0.5-1 mag, so the tolerance is 1 mag; the scale errors it is for are larger: flux unit
#: prefixes differ by 7.5 mag, e-/s taken as nJy by 31.4 - ZP_AB (a few mag), a magnitude
#: zero point left out by 10 or more.
MAG_OFFSET_MAX = 1.0
#: fewest bright isolated matches for the magnitude check; with fewer the median of chance
#: matches could pass, so the catalogue is refused unless the offset is allowed
MAG_CHECK_MIN_PAIRS = 10
#: the check uses the brightest (in truth magnitude) this many usable matches
MAG_CHECK_PAIRS = 50
#: a match is isolated when no other truth image within this radius (arcsec) is brighter
#: than the matched image's magnitude + 2.5 (holds more than a tenth of its flux)
ISOLATION_ARCSEC = 0.5

_INDEXED = re.compile(r"^(?P<name>.+?)\[(?P<index>\d+)\]$")


def parse_column(spec: str) -> tuple[str, int | None]:
    """Column name and 0-based element index of ``NAME`` or ``NAME[i]``.

    Examples
    --------
    >>> parse_column("MAG_APER[2]")
    ('MAG_APER', 2)
    >>> parse_column("mag")
    ('mag', None)
    """
    m = _INDEXED.match(spec.strip())
    if m:
        return m.group("name"), int(m.group("index"))
    return spec.strip(), None


def _read_table(path: Path) -> Table:
    name = path.name.lower()
    if not path.is_file():
        raise CatalogError(f"catalogue {str(path)!r} does not exist or is not a file")
    try:
        if name.endswith((".fits", ".fit", ".fits.gz", ".fts")):
            with fits.open(path) as hl:
                ext = next((i for i, h in enumerate(hl) if isinstance(h, fits.BinTableHDU)
                            or isinstance(h, fits.TableHDU)), None)
                if ext is None:
                    raise CatalogError(f"catalogue {str(path)!r} has no table extension")
            return Table.read(path, hdu=ext)
        if name.endswith(".ecsv"):
            return Table.read(path, format="ascii.ecsv")
        if name.endswith(".csv"):
            return Table.read(path, format="ascii.csv")
    except CatalogError:
        raise
    except Exception as exc:
        raise CatalogError(f"catalogue {str(path)!r} cannot be read: "
                           f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}"
                           ) from None
    raise CatalogError(f"catalogue {str(path)!r}: unknown format; use .fits, .ecsv or .csv")


def resolve_columns(t: Table, columns: dict, path) -> dict:
    """The table's column for each role, found as given or else ignoring case (``RA`` for
    ``ra``).

    Parameters
    ----------
    t : Table
    columns : dict
        ``{role: "NAME" or "NAME[i]"}``.
    path : str or Path
        The catalogue, for the message.

    Returns
    -------
    dict
        ``{role: (column name, 0-based element index or None)}``.

    Raises
    ------
    CatalogError
        Naming every missing column (``role='NAME'``) and listing the available ones.
    """
    avail = list(t.colnames)
    lower = {c.lower(): c for c in avail}
    missing, found = [], {}
    for role, spec in columns.items():
        name, index = parse_column(spec)
        if name in avail or name.lower() in lower:
            found[role] = (name if name in avail else lower[name.lower()], index)
        else:
            missing.append(f"{role}={spec!r}")
    if missing:
        raise CatalogError(f"catalogue {str(path)!r} lacks column(s) {', '.join(missing)}; "
                           f"available: {', '.join(avail)}")
    return found


def _column_values(t: Table, role: str, name: str, index: int | None) -> np.ndarray:
    """One float per row from column ``name`` (element ``index`` of a vector column)."""
    col = t[name]
    if getattr(col, "dtype", np.dtype(object)).kind not in "fiu":
        raise CatalogError(f"column {name!r} ({role}) is not numeric "
                           f"(dtype {col.dtype}); sexagesimal positions are not accepted")
    v = np.ma.filled(np.ma.asarray(col, dtype=float), np.nan)
    per_row = int(np.prod(v.shape[1:])) if v.ndim > 1 else 1
    if index is None and per_row > 1:
        raise CatalogError(f"{name}: {per_row} values per row ({role}); pick one as "
                           f"{name}[i] with i = 0..{per_row - 1} (0-based)")
    if index is not None:
        if per_row == 1:
            raise CatalogError(f"{name}[{index}]: one value per row; give {name} without an "
                               "index")
        if index >= per_row:
            raise CatalogError(f"{name}[{index}]: index out of range; i = 0..{per_row - 1} "
                               "(0-based)")
        v = v.reshape(len(v), per_row)[:, index]
    return np.asarray(v, float).reshape(len(t))


def _duplicates(ra, dec) -> np.ndarray:
    """Rows within :data:`DUPLICATE_ARCSEC` of an earlier row (bool per row)."""
    from scipy.spatial import cKDTree

    ra, dec = np.asarray(ra, float), np.asarray(dec, float)
    dup = np.zeros(ra.size, bool)
    if ra.size < 2:
        return dup
    # local tangent-plane offsets in arcsec (exact enough at 1 mas over a mosaic)
    d0 = np.radians(np.median(dec))
    dra = (ra - np.median(ra) + 180.0) % 360.0 - 180.0
    xy = np.column_stack([dra * np.cos(d0) * 3600.0, (dec - np.median(dec)) * 3600.0])
    for i, j in cKDTree(xy).query_pairs(DUPLICATE_ARCSEC, output_type="ndarray"):
        dup[max(i, j)] = True
    return dup


def load_catalog(path, columns: dict | None = None, skip_invalid: bool = False,
                 zeropoint: float | None = None, field: tuple[WCS, tuple[int, int]] | None = None,
                 drop_duplicates: bool = False) -> Table:
    """Read and check a detection catalogue.

    Parameters
    ----------
    path : str or Path
        FITS (first table extension), ECSV or CSV file.
    columns : dict, optional
        Column names: ``ra``, ``dec`` (deg), and either ``mag`` (AB) or ``flux`` with
        ``flux_unit`` (one of :data:`FLUX_UNITS`). Default ``ra``, ``dec``, ``mag``. A column
        with several values per row is chosen element-wise as ``NAME[i]`` (0-based).
    skip_invalid : bool
        Drop rows with NaN/inf values or positions outside the field instead of refusing.
    zeropoint : float (AB mag), optional
        Magnitude of 1 e-/s; needed for ``flux_unit='e-/s'``.
    field : (WCS, (ny, nx)), optional
        Mosaic WCS and shape; positions must fall on it.
    drop_duplicates : bool
        Keep the first of rows within :data:`DUPLICATE_ARCSEC` of each other instead of
        refusing the catalogue.

    Returns
    -------
    Table
        Columns ``ra``, ``dec`` (deg), ``mag`` (AB; NaN where a flux is <= 0) and ``row`` (row
        index in the file). Metadata: ``source``, ``columns``, ``n_skipped``, ``n_outside``,
        ``n_nonpositive_flux``, ``n_duplicates``.

    Raises
    ------
    CatalogError
        For an unreadable or empty file, missing columns (the available ones are listed),
        non-numeric values, a vector column without an index, NaN/inf values, RA/Dec out of
        range, implausible magnitudes, positions outside the field, duplicate rows.
    """
    cols = {"ra": "ra", "dec": "dec"}
    cols.update({k: v for k, v in (columns or {}).items() if v is not None})
    if "mag" in cols and "flux" in cols:
        raise CatalogError("give either a magnitude column or a flux column, not both")
    if "flux" not in cols:
        cols.setdefault("mag", "mag")
    unit = cols.pop("flux_unit", None)
    if "flux" in cols:
        unit = unit or "nJy"
        if unit not in FLUX_UNITS:
            raise CatalogError(f"flux unit {unit!r} is not one of: {', '.join(FLUX_UNITS)}")
        if unit == "e-/s" and zeropoint is None:
            raise CatalogError("flux unit 'e-/s' needs the mosaic zero point (ZP_AB)")
    path = Path(path)
    t = _read_table(path)
    if len(t) == 0:
        raise CatalogError(f"catalogue {str(path)!r} is empty (no rows)")
    found = resolve_columns(t, cols, path)
    resolved = {role: name for role, (name, _) in found.items()}
    index = {role: i for role, (_, i) in found.items()}
    data = {role: _column_values(t, role, name, index[role]) for role, name in resolved.items()}
    label = {role: name + (f"[{index[role]}]" if index[role] is not None else "")
             for role, name in resolved.items()}
    keep = np.ones(len(t), bool)
    bad = {role: int(np.sum(~np.isfinite(v))) for role, v in data.items()}
    if any(bad.values()):
        rows = ~np.all([np.isfinite(v) for v in data.values()], axis=0)
        if not skip_invalid:
            desc = ", ".join(f"{label[r]}: {n}" for r, n in bad.items() if n)
            raise CatalogError(f"catalogue {str(path)!r} has {int(rows.sum())} row(s) with "
                               f"NaN/inf values ({desc}); use skip_invalid (--skip-invalid) "
                               "to drop them")
        keep &= ~rows
    ra, dec = data["ra"], data["dec"]
    fin = keep
    if np.any((ra[fin] < 0) | (ra[fin] >= 360)):
        raise CatalogError(f"column {resolved['ra']!r} has values outside [0, 360) "
                           f"(range {np.nanmin(ra):g} .. {np.nanmax(ra):g}); RA must be in degrees")
    if np.any(np.abs(dec[fin]) > 90):
        raise CatalogError(f"column {resolved['dec']!r} has values outside [-90, 90] "
                           f"(range {np.nanmin(dec):g} .. {np.nanmax(dec):g}); "
                           "Dec must be in degrees")
    n_nonpos = 0
    if "flux" in data:
        f = data["flux"]
        zp = zeropoint if unit == "e-/s" else FLUX_UNITS[unit]
        with np.errstate(divide="ignore", invalid="ignore"):
            mag = np.where(f > 0, zp - 2.5 * np.log10(np.where(f > 0, f, 1.0)), np.nan)
        n_nonpos = int(np.sum(keep & (f <= 0)))
        med = np.nanmedian(mag[keep]) if np.any(keep & np.isfinite(mag)) else np.nan
        if np.isfinite(med) and not (_MAG_PLAUSIBLE[0] <= med <= _MAG_PLAUSIBLE[1]):
            raise CatalogError(f"fluxes in column {label['flux']!r} give a median AB "
                               f"magnitude of {med:.1f} with unit {unit!r}; check --flux-unit")
    else:
        mag = data["mag"]
        m = mag[keep]
        lo, hi = _MAG_PLAUSIBLE
        if np.any((m < lo) | (m > hi)):
            raise CatalogError(f"column {label['mag']!r} has values outside the plausible "
                               f"AB range [{lo:g}, {hi:g}] (range {m.min():g} .. {m.max():g}); "
                               "if it holds fluxes use --flux-col with --flux-unit")
    n_out = 0
    if field is not None:
        wcs, (ny, nx) = field
        x, y = wcs.all_world2pix(ra, dec, 0)
        inside = (x >= -0.5) & (x <= nx - 0.5) & (y >= -0.5) & (y <= ny - 0.5)
        out = keep & ~inside
        n_out = int(out.sum())
        if n_out == int(keep.sum()):
            raise CatalogError(f"none of the {n_out} positions of catalogue {str(path)!r} falls "
                               "on the mosaic (wrong field, or RA/Dec swapped?)")
        if n_out and not skip_invalid:
            raise CatalogError(f"{n_out} position(s) of catalogue {str(path)!r} fall outside "
                               "the mosaic; use skip_invalid (--skip-invalid) to drop them")
        keep &= inside
    dup = np.zeros(len(t), bool)
    dup[keep] = _duplicates(ra[keep], dec[keep])
    n_dup = int(dup.sum())
    if n_dup and not drop_duplicates:
        raise CatalogError(f"{label['ra']}/{label['dec']}: {n_dup} row(s) within "
                           f"{DUPLICATE_ARCSEC * 1e3:g} milliarcsec of an earlier row; "
                           "--drop-duplicates keeps the first of each")
    keep &= ~dup
    res = Table({"ra": ra[keep], "dec": dec[keep], "mag": mag[keep],
                 "row": np.flatnonzero(keep)})
    res["ra"].unit = res["dec"].unit = "deg"
    res["mag"].unit = "mag"
    res.meta.update({"source": str(path), "columns": label,
                     "n_skipped": int(len(t) - keep.sum() - n_dup), "n_outside": n_out,
                     "n_nonpositive_flux": n_nonpos, "n_duplicates": n_dup})
    return res


def check_magnitude_scale(det_mag, truth_mag, usable, column: str, allow: bool = False) -> dict:
    """Median catalogue - truth magnitude of the brightest usable matches, refused beyond
    :data:`MAG_OFFSET_MAX` unless ``allow``.

    Parameters
    ----------
    det_mag, truth_mag : array_like (AB mag)
        Catalogue and truth (observed, lensed) magnitudes of matched pairs.
    usable : array_like of bool
        Pairs fit for the check: isolated, not flagged (saturated or uncovered).
    column : str
        Name of the catalogue's magnitude (or flux) column, for the message.
    allow : bool
        Report the offset instead of refusing (``--allow-flux-offset``).

    Returns
    -------
    dict
        ``n_pairs`` (used), ``median_offset`` (mag, None with fewer than
        :data:`MAG_CHECK_MIN_PAIRS` pairs), ``tolerance`` (mag), ``allowed``.

    Raises
    ------
    CatalogError
        Offset beyond the tolerance, or fewer than :data:`MAG_CHECK_MIN_PAIRS` usable pairs,
        unless ``allow``.
    """
    d = np.asarray(det_mag, float)
    tm = np.asarray(truth_mag, float)
    ok = np.asarray(usable, bool) & np.isfinite(d) & np.isfinite(tm)
    idx = np.flatnonzero(ok)[np.argsort(tm[ok], kind="stable")][:MAG_CHECK_PAIRS]
    res = {"n_pairs": int(idx.size), "median_offset": None, "tolerance": MAG_OFFSET_MAX,
           "allowed": bool(allow)}
    if idx.size < MAG_CHECK_MIN_PAIRS:
        if not allow:
            raise CatalogError(f"{column}: only {idx.size} bright isolated matches to check "
                               f"the magnitude scale, at least {MAG_CHECK_MIN_PAIRS} needed; "
                               "--allow-flux-offset scores it unchecked")
        return res
    off = float(np.median(d[idx] - tm[idx]))
    res["median_offset"] = off
    if abs(off) > MAG_OFFSET_MAX and not allow:
        raise CatalogError(f"{column}: median offset {off:+.2f} mag from the truth over the "
                           f"{idx.size} brightest isolated matches, at most "
                           f"{MAG_OFFSET_MAX:g} mag allowed (wrong flux unit or zero point?); "
                           "--allow-flux-offset scores it anyway")
    return res
