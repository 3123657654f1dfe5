"""Entry points: score a run's selection (pipeline) or a user's own selected catalogue (CLI).

``score_run_selection`` reads ``<run>/photometry.fits`` (HDU ``PHOTOMETRY``: ``id``, ``ra``,
``dec`` (deg), ``flux_<b>``, ``flux_err_<b>`` (nJy) per band, meta ``DETBAND``) and, where
present, ``<run>/photoz.fits`` (HDU ``PHOTOZ``: ``id``, ``z_best``, ``p_gt_<c>``), applies
every sample of ``sc.selection`` and writes ``<run>/selection/<sample>/``.
``score_catalogue_selection`` does the same for a user catalogue, with its own selection flag
(``select_col``) or redshift column (``zphot_col``: selected where it lies in the sample's
window), or else the samples' cuts on its ``flux_<b>`` columns. Every input is read and checked
before anything is written; a refusal is one line (:class:`simfield.errors.CatalogError`).

Units: deg, nJy, AB mag.
"""

from __future__ import annotations

import logging
import shutil
from pathlib import Path

import numpy as np
from astropy.table import MaskedColumn, Table, join

from ..errors import CatalogError
from .cuts import apply_samples, check_columns

log = logging.getLogger("simfield")

__all__ = ["load_photometry", "score_run_selection", "score_catalogue_selection"]


def load_photometry(run_dir, need_photoz: bool = False):
    """``photometry.fits`` joined (on ``id``) with ``photoz.fits`` where present.

    Returns
    -------
    (Table, str)
        The table in the photometry's row order, and its detection band (``DETBAND``).
    """
    run_dir = Path(run_dir)
    p = run_dir / "photometry.fits"
    if not p.is_file():
        raise CatalogError(f"run directory {str(run_dir)!r} has no photometry.fits")
    t = Table.read(p, hdu="PHOTOMETRY")
    band = t.meta.get("DETBAND")
    if not band:
        raise CatalogError(f"{p.name} has no DETBAND in its PHOTOMETRY header")
    pz = run_dir / "photoz.fits"
    if pz.is_file():
        z = Table.read(pz, hdu="PHOTOZ")
        from astropy.io import fits

        with fits.open(pz) as hl:  # P(z) rows go along, for the report's contaminant panel
            if "PZ" in hl and "ZGRID" in hl and hl["PZ"].data is not None \
                    and len(hl["PZ"].data) == len(z):
                z["pz"] = np.asarray(hl["PZ"].data, np.float32)
                t.meta["pz_grid"] = [float(v) for v in Table(hl["ZGRID"].data).columns[0]]
        if len(t) and len(z):
            t["_order"] = np.arange(len(t))
            t = join(t, z, keys="id", join_type="left", table_names=["", "photoz"],
                     metadata_conflicts="silent")
            t.sort("_order")
            t.remove_column("_order")
        else:  # astropy's join refuses an empty table: the left join by hand, all masked
            for name in z.colnames:
                if name != "id":
                    c = z[name]
                    t[f"{name}_photoz" if name in t.colnames else name] = MaskedColumn(
                        np.zeros((len(t),) + c.shape[1:], c.dtype), mask=True, unit=c.unit,
                        description=c.description)
        t.meta["photoz"] = True
    elif need_photoz:
        raise CatalogError(f"selection: a photoz condition needs photoz.fits, not found in "
                           f"{str(run_dir)!r}")
    return t, str(band)


def _needs_photoz(samples) -> bool:
    return any(c.kind == "photoz" for s in samples for c in s.conditions)


_JOB = None  # (arguments of score_sample but the sample), set before forking sample workers


def _score_one(i: int):
    from .score import score_sample

    samples, selections, det, truth, matched, cfg, z_max, out_root, bands, prov = _JOB
    s = samples[i]
    return score_sample(s, selections[s.name], det, truth, matched, cfg, z_max,
                        Path(out_root) / s.name, bands, prov=prov)


def _score_all(run_dir, det, band, selections: dict, samples, sc, out_root, prov,
               workers: int = 1):
    """Score every sample (:func:`.score.score_sample`), in ``workers`` forked processes if
    more than one: each sample writes only its own folder and draws nothing at random, so the
    files do not depend on the number of processes."""
    from ..bands import make_band
    from ..score.run import load_truth
    from .score import match_catalogue

    global _JOB
    truth = load_truth(run_dir, band)
    matched = match_catalogue(truth, det, sc.score, band)
    bands = [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
             for b in sc.telescope.bands]  # as simfield.pipeline.make_bands, for the tracks
    _JOB = (samples, selections, det, truth, matched, sc.selection, sc.population.z_max,
            out_root, bands, prov)
    try:
        n = min(workers, len(samples))
        if n <= 1:
            got = [_score_one(i) for i in range(len(samples))]
        else:
            import multiprocessing
            import os
            from concurrent.futures import ProcessPoolExecutor

            from .._procs import die_with_parent

            with ProcessPoolExecutor(n, mp_context=multiprocessing.get_context("fork"),
                                     initializer=die_with_parent,
                                     initargs=(os.getpid(),)) as pool:
                got = list(pool.map(_score_one, range(len(samples))))
    finally:
        _JOB = None
    return {s.name: r for s, r in zip(samples, got)}


def score_run_selection(run_dir, sc, prov=None, workers: int = 1) -> dict:
    """Apply and score every sample of ``sc.selection`` on the run's ``photometry.fits``.

    Parameters
    ----------
    run_dir : str or Path
    sc : Scenario
    prov : Provenance, optional
    workers : int
        Local processes for the samples (forked; 1: here, one after the other).

    Returns
    -------
    dict
        Per sample, the summary written to ``<run_dir>/selection/<sample>/summary.json``.
    """
    samples = list(sc.selection.samples)
    det, band = load_photometry(run_dir, _needs_photoz(samples))
    # validation checked the samples against the configured bands; a scenario whose bands were
    # changed afterwards (from Python) skips the samples it cannot evaluate, and says so
    bands = set(sc.band_names)
    usable = [s for s in samples
              if all(set(c.bands) | set(c.slope_bands) <= bands for c in s.conditions)]
    for s in samples:
        if s not in usable:
            log.warning("selection: sample %s skipped: the run lacks the bands it needs", s.name)
    samples = usable
    check_columns(det, samples, "photometry.fits (+ photoz.fits)")
    masks = {k: v[0] for k, v in apply_samples(det, samples).items()}
    return _score_all(run_dir, det, band, masks, samples, sc, Path(run_dir) / "selection", prov,
                      workers)


def _pick(samples, names):
    if not names:
        return samples
    known = [s.name for s in samples]
    for n in names:
        if n not in known:
            raise CatalogError(f"--sample: {n!r} is not a sample; one of {', '.join(known)}")
    return [s for s in samples if s.name in names]


def score_catalogue_selection(run_dir, catalog, sc, band: str, select_col: str | None = None,
                              zphot_col: str | None = None, samples=None, out_root=None,
                              columns: dict | None = None) -> dict:
    """Score a user's multi-band catalogue's selection against a run's truth.

    Parameters
    ----------
    run_dir : str or Path
    catalog : str or Path
        FITS / ECSV / CSV table with ``ra``, ``dec`` (deg; names in ``columns``).
    sc : Scenario
        Samples, bins and the score's match settings.
    band : str
        Band whose truth images the catalogue is matched to.
    select_col : str, optional
        Boolean column: the user's own selection, scored for each chosen sample's window.
    zphot_col : str, optional
        Redshift column: selected where it lies in each sample's window.
    samples : list of str, optional
        Sample names (default all).
    out_root : str or Path, optional
        Default ``<run_dir>/selection_<catalogue stem>``.
    columns : dict, optional
        ``{"ra": name, "dec": name}``; default ``ra``, ``dec``, found ignoring case as by
        :func:`simfield.score.catalog.resolve_columns`.

    Returns
    -------
    dict
        Per sample, its summary.
    """
    from ..score.catalog import _column_values, _read_table, resolve_columns

    chosen = _pick(list(sc.selection.samples), samples)
    path = Path(catalog)
    if not path.is_file():
        raise CatalogError(f"catalogue {str(catalog)!r} does not exist")
    t = _read_table(path)
    # ra and dec found as simfield-score finds them (RA for ra, NAME[i] for an element)
    want = {"ra": "ra", "dec": "dec", **{k: v for k, v in (columns or {}).items()
                                         if k in ("ra", "dec") and v is not None}}
    found = resolve_columns(t, want, path)
    for c in (select_col, zphot_col):
        if c is not None and c not in t.colnames:
            raise CatalogError(f"catalogue lacks column {c!r}; available: {', '.join(t.colnames)}")
    for role, (name, index) in found.items():
        t[role] = _column_values(t, role, name, index)
    if select_col is not None:
        v = np.asarray(t[select_col])
        if v.dtype.kind not in "bi" or (v.dtype.kind == "i" and not np.isin(v, (0, 1)).all()):
            raise CatalogError(f"--select-col {select_col!r} must hold booleans (or 0/1), not "
                               f"{v.dtype}")
        masks = {s.name: v.astype(bool) for s in chosen}
    elif zphot_col is not None:
        zp = np.asarray(t[zphot_col], float)
        masks = {s.name: np.isfinite(zp) & (zp >= s.z_min) & (zp <= s.z_max) for s in chosen}
    else:
        plain = {c.sample for s in chosen for c in s.conditions if c.kind == "exclude"}
        run = chosen + [s for s in sc.selection.samples if s.name in plain and s not in chosen]
        check_columns(t, run, f"catalogue {path.name}")
        masks = {k: v[0] for k, v in apply_samples(t, run).items()}
    stem = path.name.split(".")[0] or "catalog"
    out = Path(out_root) if out_root is not None else Path(run_dir) / f"selection_{stem}"
    fresh = not out.exists()
    try:
        return _score_all(run_dir, t, band, masks, chosen, sc, out, None)
    except BaseException:  # an unforeseen failure leaves no partial folder behind
        if fresh:
            shutil.rmtree(out, ignore_errors=True)
        raise
