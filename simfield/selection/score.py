"""Scoring a selected sample against a run's truth.

Per sample, written into ``<run>/selection/<sample>/`` (ECSV with units and descriptions):

- ``completeness.ecsv``: S(M_UV, z) = P(detected and selected | true M_UV, z) over the truth
  galaxies (kinds :data:`GALAXY_KINDS`), Jeffreys intervals (:func:`beta_interval`);
- ``effective_volume.ecsv``: V_eff(M_UV) (:mod:`simfield.selection.volume`) and expected
  numbers from the population's luminosity function;
- ``contamination.ecsv``: the selected detections by class (:data:`CLASSES`), count and
  fraction with its interval;
- ``redshift_distribution.ecsv``: truth redshifts of the selected detections;
- ``selected.ecsv``: every selected detection with its truth match and class;
- ``summary.json``, and ``report.html`` when the configuration asks for it.

Matching and the causes of unmatched detections are those of :mod:`simfield.score.run`.
Units: magnitudes AB, fluxes nJy, volumes Mpc^3, solid angles arcsec^2.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.table import Table

from ..score.metrics import INTERVAL_NOTE, beta_interval, binned_fraction_2d
from ..score.match import gather
from ..score.run import false_detection_causes, match_to_truth, source_recovery
from .volume import expected_counts, poisson_summary, selection_volume, source_plane_area

__all__ = ["GALAXY_KINDS", "CLASSES", "classify_selected", "score_sample"]

#: truth kinds counted as galaxies for S(M_UV, z)
GALAXY_KINDS = ("galaxy", "dusty", "quiescent")
#: classes of selected detections
CLASSES = ("in_window", "lowz_galaxy", "higher_z_galaxy", "dusty", "quiescent", "star",
           "dwarf", "member", "icl", "noise", "blend", "shred", "spike", "artefact")

_UNITS = {"abs_mag_uv_lo": "mag", "abs_mag_uv_hi": "mag", "v_eff_mpc3": "Mpc3",
          "v_eff_window_mpc3": "Mpc3", "ra": "deg", "dec": "deg"}
_DESC = {
    "n": "truth galaxies in the cell", "k": "of which detected and selected",
    "fraction": "S = k / n", "fraction_lo": "lower end of the Jeffreys interval",
    "fraction_hi": "upper end of the Jeffreys interval",
    "v_eff_mpc3": "effective volume, integral S dV_c/dz dz over all z bins",
    "v_eff_window_mpc3": "part of v_eff_mpc3 from z bins inside the target window",
    "n_expected": "expected selected galaxies, S x integral phi dM dV (all z bins)",
    "n_expected_window": "as n_expected, z bins inside the target window",
    "count": "selected detections of the class", "class": "what the selected detection is",
}


def classify_selected(matched_kind, matched_z, cause, z_window) -> np.ndarray:
    """Class (:data:`CLASSES`) of each selected detection.

    Parameters
    ----------
    matched_kind : array_like of str
        Truth kind of the matched source, ``""`` if unmatched.
    matched_z : array_like
        Its truth redshift.
    cause : array_like of str
        Cause of an unmatched detection (noise, blend, shred, spike, artefact).
    z_window : (float, float)
        Target window (inclusive).
    """
    kind = np.asarray(matched_kind).astype(str)
    z = np.asarray(matched_z, float)
    cls = np.asarray(cause).astype("<U16").copy()
    gal = np.isin(kind, GALAXY_KINDS)
    inw = gal & (z >= z_window[0]) & (z <= z_window[1])
    cls[gal & (z < z_window[0])] = "lowz_galaxy"
    cls[gal & (z > z_window[1])] = "higher_z_galaxy"
    for k in ("dusty", "quiescent"):
        cls[(kind == k) & ~inw] = k
    cls[inw] = "in_window"
    for k in ("star", "dwarf", "member", "icl"):
        cls[kind == k] = k
    return cls


def _describe(t: Table, desc: str) -> Table:
    for c in t.colnames:
        if c in _UNITS:
            t[c].unit = _UNITS[c]
        if c in _DESC:
            t[c].description = _DESC[c]
    t.meta["description"] = desc
    return t


def _edges(lo, hi, step):
    n = int(np.floor((hi - lo) / step + 1e-9))
    return lo + step * np.arange(n + 1)


def match_catalogue(truth: dict, det: Table, score_cfg, band: str) -> dict:
    """Match a catalogue to the truth and classify every detection (score.run's rules).

    Returns
    -------
    dict
        ``kind``, ``z``, ``source_id`` (of the matched truth source per detection, ``""`` /
        NaN / -1 if unmatched), ``cause`` (unmatched detections), ``det_for_src`` and
        ``has_img`` per truth source, ``images`` on the mosaic.
    """
    sources = truth["sources"]
    radius, images, ix, iy, m = match_to_truth(truth, det, score_cfg)
    img_src = np.asarray(images["source_id"], np.int64)
    mag_img = np.asarray(images[f"mag_{band}"], float)
    sid = np.asarray(sources["id"], np.int64)
    kind = np.asarray(sources["kind"]).astype(str)
    recovered, best_img, det_for_src = source_recovery(sid, img_src, mag_img, m)
    cause, _, _, _ = false_detection_causes(truth, det, score_cfg, m, ix, iy, img_src, mag_img,
                                            sid, kind, recovered)
    pos = {int(s): i for i, s in enumerate(sid)}
    n = len(det)
    d_src = np.full(n, -1, np.int64)
    d_src[m.det_index] = img_src[m.truth_index]
    row = np.array([pos.get(int(s), -1) for s in d_src], np.int64)
    z_all = np.asarray(sources["redshift"], float)
    d_kind = gather(kind, row, "")
    d_z = gather(z_all, row, np.nan)
    return {"kind": d_kind, "z": d_z, "source_id": d_src, "cause": cause,
            "det_for_src": det_for_src, "has_img": best_img >= 0, "images": images,
            "radius": radius}


def score_sample(sample, selected, det: Table, truth: dict, matched: dict, sel_cfg,
                 z_max: float, out_dir, bands=None, phi=None, prov=None) -> dict:
    """Score one sample's selection and write its tables, summary and report.

    Parameters
    ----------
    sample : SampleConfig
        Name, target truth-redshift window (``z_min``, ``z_max``) and conditions.
    selected : ndarray of bool
        Per detection (row of ``det``).
    det : Table
        Catalogue (``ra``, ``dec`` in deg; flux columns for the report).
    truth : dict
        :func:`simfield.score.run.load_truth`.
    matched : dict
        :func:`match_catalogue`.
    sel_cfg : SelectionConfig
        Bins and interval level.
    z_max : float
        Largest redshift of the S grid.
    out_dir : str or Path
    bands : sequence of simfield.bands.Band, optional
        For the report's template tracks.
    phi : callable (M_UV, z) -> Mpc^-3 mag^-1, optional
        Luminosity function; default the population's own
        (:func:`simfield.population.luminosity.uv_luminosity_function`).
    prov : Provenance, optional

    Returns
    -------
    dict
        The summary written to ``summary.json``.
    """
    from ..io import atomic_path, write_json, write_table
    from ..population.luminosity import uv_luminosity_function

    phi = phi or uv_luminosity_function
    name, z_window = sample.name, (float(sample.z_min), float(sample.z_max))
    out = Path(out_dir)
    lvl = sel_cfg.interval
    sources = truth["sources"]
    selected = np.asarray(selected, bool)
    kind = np.asarray(sources["kind"]).astype(str)
    z = np.asarray(sources["redshift"], float)
    M = np.asarray(sources["abs_mag_uv"], float)
    dfs = matched["det_for_src"]
    detsel = gather(selected, dfs, False)
    gal = matched["has_img"] & np.isin(kind, GALAXY_KINDS)
    me = _edges(sel_cfg.abs_mag_min, sel_cfg.abs_mag_max, sel_cfg.abs_mag_step)
    # regular z bins, split at the window's edges so the window is a union of bins
    ze = _edges(0.0, max(z_max, z_window[1]) + sel_cfg.z_step, sel_cfg.z_step)
    ze = np.unique(np.round(np.concatenate([ze, z_window]), 9))
    comp = binned_fraction_2d(M[gal], z[gal], detsel[gal], me, ze, lvl, ("abs_mag_uv", "z"))
    frac = np.asarray(comp["fraction"], float).reshape(me.size - 1, ze.size - 1)

    # source-plane solid angle from the truth images of the galaxies in the window (all galaxies
    # if fewer than 20 there)
    ny, nx = truth["shape"]
    area_img = float(nx * ny) * truth["pixel_scale"] ** 2
    inw_src = gal & (z >= z_window[0]) & (z <= z_window[1])
    use = inw_src if inw_src.sum() >= 20 else gal
    images = matched["images"]
    on_src = np.isin(np.asarray(images["source_id"]), np.asarray(sources["id"])[use])
    area_src = source_plane_area(area_img, np.asarray(images["magnification"], float)[on_src],
                                 int(use.sum()))
    vol = selection_volume(frac, me, ze, area_src, z_window)
    nexp = expected_counts(frac, me, ze, area_src, phi)
    inw_z = (ze[:-1] >= z_window[0] - 1e-9) & (ze[1:] <= z_window[1] + 1e-9)
    vol["n_expected"] = nexp.sum(axis=1)
    vol["n_expected_window"] = nexp[:, inw_z].sum(axis=1)
    z_lo_w, z_hi_w = (float(ze[:-1][inw_z].min()), float(ze[1:][inw_z].max())) if inw_z.any() \
        else (z_window[0], z_window[1])
    in_bins = gal & (M >= me[0]) & (M < me[-1])
    n_obs_win = int(np.sum(detsel & in_bins & (z >= z_lo_w) & (z < z_hi_w)))
    n_obs_gal = int(np.sum(detsel & in_bins & (z >= ze[0]) & (z < ze[-1])))

    # contamination of the selected sample
    cls = classify_selected(matched["kind"], matched["z"], matched["cause"], z_window)[selected]
    n_sel = int(selected.sum())
    counts = np.array([np.sum(cls == c) for c in CLASSES])
    lo, hi = beta_interval(counts, n_sel, lvl)
    cont = Table({"class": list(CLASSES), "count": counts,
                  "fraction": counts / n_sel if n_sel else np.full(counts.size, np.nan),
                  "fraction_lo": lo, "fraction_hi": hi})
    cont.meta["n_selected"] = n_sel
    cont.meta["interval"] = INTERVAL_NOTE.format(level=lvl)
    zs = matched["z"][selected]
    hz, _ = np.histogram(zs[np.isfinite(zs)], ze)
    zdist = Table({"z_lo": ze[:-1], "z_hi": ze[1:], "n_selected": hz, "in_window": inw_z})
    sel_t = Table({"row": np.flatnonzero(selected),
                   "id": np.asarray(det["id"])[selected] if "id" in det.colnames else
                   np.flatnonzero(selected),
                   "ra": np.asarray(det["ra"], float)[selected],
                   "dec": np.asarray(det["dec"], float)[selected],
                   "truth_id": matched["source_id"][selected],
                   "truth_kind": np.asarray(matched["kind"]).astype(str)[selected],
                   "truth_z": zs, "class": cls})
    tables = {
        "completeness": _describe(comp, "S(M_UV, z): fraction of truth galaxies detected and "
                                        "selected, per cell of true M_UV and redshift"),
        "effective_volume": _describe(vol, "V_eff(M_UV) over the source-plane solid angle, and "
                                           "expected selected galaxies from the luminosity "
                                           "function; cells without truth galaxies count as "
                                           "S = 0"),
        "contamination": _describe(cont, "selected detections by class, fractions of all "
                                         "selected"),
        "redshift_distribution": _describe(zdist, "truth redshifts of the selected detections "
                                                  "(matched ones)"),
        "selected": _describe(sel_t, "selected detections with their truth match"),
    }
    summary = {
        "sample": name, "z_window": [float(z_window[0]), float(z_window[1])],
        "n_detections": int(len(det)), "n_selected": n_sel,
        "n_truth_galaxies": int(gal.sum()), "n_truth_in_window": int(inw_src.sum()),
        "contamination": {c: int(k) for c, k in zip(CLASSES, counts)},
        "purity": (float(counts[0] / n_sel) if n_sel else None),
        "area_image_arcsec2": area_img, "area_source_arcsec2": area_src,
        "abs_mag_range": [float(me[0]), float(me[-1])],
        "counts_window": poisson_summary(n_obs_win, float(nexp[:, inw_z].sum())),
        "counts_all_z": poisson_summary(n_obs_gal, float(nexp.sum())),
        "counts_note": ("observed: truth galaxies detected and selected inside the M_UV range "
                        "(and, for counts_window, the window's z bins); expected: sum of S x "
                        "phi x volume over the same cells"),
    }
    out.mkdir(parents=True, exist_ok=True)
    for key, t in tables.items():
        t.meta["sample"] = name
        if prov is not None:
            write_table(out / f"{key}.ecsv", t, prov)
        else:
            with atomic_path(out / f"{key}.ecsv") as tmp:
                t.write(tmp, format="ascii.ecsv", overwrite=True)
    if sel_cfg.report:
        from .report import make_report

        summary["report"] = str(make_report(out, sample, bands, det, selected, cls, tables,
                                            summary, run_dir=truth.get("run_dir")))
    write_json(out / "summary.json", summary, prov)
    return summary
