"""Score a detection catalogue against a run directory's truth: tables, summary and report.

``load_catalog`` (:mod:`simfield.score.catalog`) reads and checks a user catalogue (FITS, ECSV
or CSV), ``score_run`` matches it to the truth images of one band, checks the catalogue's
magnitude scale on bright isolated matches, and writes, into ``<out_dir>`` (default
:func:`default_out_dir`: ``<run_dir>/score_<catalogue file stem>/<band>``; the pipeline writes
its own into ``<run_dir>/score/<band>``):

- ``completeness_mag.ecsv``, ``completeness_size.ecsv``, ``completeness_sb.ecsv``,
  ``completeness_z.ecsv``, ``completeness_mu.ecsv``, ``completeness_mag_size.ecsv``: fractions of
  truth galaxies recovered per bin of observed magnitude, observed half-light radius, mean
  surface brightness, redshift, magnification, and magnitude x size;
- ``purity_mag.ecsv``: fraction of detections matched, per measured magnitude;
- ``false_detections.ecsv``: every unmatched detection with its likely cause;
- ``photometry.ecsv``: measured - true magnitude per true magnitude;
- ``effective_volume.ecsv``: recovered fraction x comoving volume per (M_UV, z) bin;
- ``recovered.ecsv``: each truth source with its recovery flag and matched detection;
- ``summary.json``, and ``report.html`` with its PNG plots when ``cfg.report``.

Every file is written atomically (temporary file, then ``os.replace``), and only after every
input has been read and checked, so a failure leaves no partial output.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from .._argparse import ArgError, DefaultsHelpFormatter, OneLineParser, check_out_folder
from ..columns import POINT_KINDS, SCORE_COLUMNS, SCORE_TABLES, describe
from ..config import ScoreConfig, _validate_score
from ..errors import CatalogError, ConfigError
from ..io import COMPLETE_MARKER
from . import metrics
from .catalog import FLUX_UNITS, ISOLATION_ARCSEC, check_magnitude_scale, load_catalog
from .match import gather, match_radius, match_sky
from .volume import binned_effective_volume

__all__ = ["FLUX_UNITS", "load_catalog", "load_truth", "image_map", "pixel_values",
           "default_out_dir", "match_to_truth", "source_recovery",
           "false_detection_causes", "score_run", "score_pipeline_run", "score_main_args"]


# --------------------------------------------------------------------------------------------
def _need(path: Path) -> Path:
    if not path.is_file():
        raise CatalogError(f"run directory lacks {path.name} ({str(path)!r})")
    return path


def run_bands(run_dir) -> list[str]:
    """Bands of the run's ``mosaic_<band>.fits`` files, sorted by name."""
    return sorted(p.name[len("mosaic_"):-len(".fits")]
                  for p in Path(run_dir).glob("mosaic_*.fits"))


#: numpy dtype of each FITS BITPIX (FITS data are big-endian)
_BITPIX_DTYPE = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}


def image_map(path, name: str) -> np.ndarray:
    """Read-only memory map of the image extension ``name`` of a FITS file.

    Only the pages that are indexed are read, so a mosaic larger than memory can be sampled
    (strided rows, cut-outs, values at a list of pixels). An image with BSCALE/BZERO scaling
    cannot be mapped and is read whole.

    Parameters
    ----------
    path : str or Path
        FITS file.
    name : str
        Extension name (e.g. ``IMAGE``, ``SEGMAP``, ``FLAGS``).

    Returns
    -------
    numpy.memmap or ndarray, shape (ny, nx)
        The image in its stored type (big-endian), in the file's units.
    """
    with fits.open(path, memmap=True) as hl:
        i = hl.index_of(name)
        h = hl[i].header
        loc = hl.fileinfo(i)["datLoc"]
        scaled = float(h.get("BSCALE", 1)) != 1 or float(h.get("BZERO", 0)) != 0
        if scaled or type(hl[i]) not in (fits.ImageHDU, fits.PrimaryHDU):  # e.g. compressed
            return np.array(hl[i].data)
    shape = tuple(int(h[f"NAXIS{k}"]) for k in range(int(h["NAXIS"]), 0, -1))
    return np.memmap(path, dtype=_BITPIX_DTYPE[int(h["BITPIX"])], mode="r", offset=loc,
                     shape=shape)


def pixel_values(img, x, y) -> np.ndarray:
    """Values of ``img`` at the pixels nearest to 0-based positions ``x``, ``y`` (clipped to
    the image), reading only those pixels of a memory map.

    Parameters
    ----------
    img : ndarray or numpy.memmap, shape (ny, nx)
    x, y : array_like (0-based pixels)

    Returns
    -------
    ndarray
        One value per position, native byte order.
    """
    ny, nx = img.shape
    ix = np.clip(np.round(np.asarray(x, float)).astype(int), 0, nx - 1)
    iy = np.clip(np.round(np.asarray(y, float)).astype(int), 0, ny - 1)
    v = np.asarray(img[iy, ix])
    return v.astype(v.dtype.newbyteorder("="))


def load_truth(run_dir, band: str) -> dict:
    """Read what scoring needs from a run directory, in memory bounded by the tables.

    The images are memory maps of the files (:func:`image_map`), not copies: index them for
    the pixels needed (:func:`pixel_values`, cut-outs, strided samples).

    Returns
    -------
    dict
        ``sources``, ``images`` (Tables), ``wcs``, ``shape`` (ny, nx), ``zeropoint`` (AB),
        ``pixel_scale`` (arcsec), ``segm`` (truth source ids, int32 memory map, or None),
        ``dq`` (the truth's map of detector artefacts, ``ARTEFACT`` of the truth image, int16
        memory map; for a run without one, the mosaic's flags; or None) with ``dq_bits``
        (int: the bits that make a detection an artefact), ``art_causes`` (dict: truth bits
        with a cause of their own, from the ``ARTSTRIP`` / ``ARTPERSI`` cards), ``psf`` (image or None), ``psf_fwhm`` (arcsec or None), ``sci`` (mosaic
        image, float32 memory map, e-/s).
    """
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise CatalogError(f"run directory {str(run_dir)!r} does not exist")
    mpath = run_dir / f"mosaic_{band}.fits"
    if not mpath.is_file():
        raise CatalogError(f"run directory lacks {mpath.name} ({str(mpath)!r}); its bands: "
                           f"{', '.join(run_bands(run_dir)) or 'none'}")
    with fits.open(mpath, memmap=True) as hl:
        hdr = hl["IMAGE"].header.copy()
        dq_bits = None
        if "FLAGS" in hl:  # a run without an artefact truth map: saturated or no data
            h = hl["FLAGS"].header
            dq_bits = int(h.get("FSATUR", 4)) | int(h.get("FNODATA", 1))
    sci = image_map(mpath, "IMAGE")
    dq = image_map(mpath, "FLAGS") if dq_bits is not None else None
    if "ZP_AB" not in hdr:
        raise CatalogError(f"{mpath.name} has no ZP_AB keyword in its IMAGE header")
    wcs = WCS(hdr).celestial
    scale = float(np.sqrt(abs(np.linalg.det(wcs.pixel_scale_matrix))) * 3600.0)
    tpath = _need(run_dir / "truth.fits")
    sources = Table.read(tpath, hdu="SOURCES")
    try:
        images = Table.read(tpath, hdu="IMAGES")
    except KeyError:
        images = None
    if images is None or len(images) == 0:
        images = Table({"image_id": np.arange(1, len(sources) + 1), "source_id": sources["id"],
                        "ra": sources["ra"], "dec": sources["dec"], "x": sources["x"],
                        "y": sources["y"], "magnification": np.ones(len(sources)),
                        f"mag_{band}": sources[f"mag_{band}"]})
    if f"mag_{band}" not in images.colnames:
        raise CatalogError(f"truth IMAGES has no column mag_{band}; "
                           f"available: {', '.join(images.colnames)}")
    segm = None
    art_causes: dict = {}
    ti = run_dir / f"truth_image_{band}.fits"
    if ti.is_file():
        with fits.open(ti, memmap=True) as hl:
            has_segm, has_art = "SEGMAP" in hl, "ARTEFACT" in hl
        if has_segm:
            segm = image_map(ti, "SEGMAP")
        if has_art:  # the truth knows every artefact pixel: any bit makes an artefact
            dq, dq_bits = image_map(ti, "ARTEFACT"), -1
            with fits.open(ti, memmap=True) as hl:  # bits with a cause of their own
                h = hl["ARTEFACT"].header
                art_causes = {int(h[k]): name for k, name in
                              (("ARTPERSI", "persistence"), ("ARTSTRIP", "stripe")) if k in h}
    psf, fwhm = None, None
    pp = run_dir / f"psf_{band}.fits"
    if pp.is_file():
        with fits.open(pp) as hl:
            h = hl["PSF_WIDE"] if "PSF_WIDE" in hl else hl[1 if len(hl) > 1 else 0]
            psf = np.asarray(h.data, float)
            det = hl["PSF_DET"] if "PSF_DET" in hl else h
            fwhm = float(det.header["FWHM"]) if "FWHM" in det.header else None
            psf_scale = float(h.header.get("PIXSCALE", scale))
    return {"sources": sources, "images": images, "wcs": wcs, "shape": tuple(sci.shape),
            "zeropoint": float(hdr["ZP_AB"]), "pixel_scale": scale, "segm": segm, "dq": dq,
            "dq_bits": dq_bits, "art_causes": art_causes, "psf": psf, "psf_fwhm": fwhm,
            "psf_scale": psf_scale if psf is not None else None, "sci": sci,
            "run_dir": run_dir}


def _own_detections(run_dir: Path, band: str) -> Table:
    """The run's ``detections_<band>.fits`` as ra, dec, mag (NaN mag kept: flux <= 0)."""
    t = Table.read(_need(run_dir / f"detections_{band}.fits"), hdu="DETECTIONS")
    res = Table({"ra": np.asarray(t["ra"], float), "dec": np.asarray(t["dec"], float),
                 "mag": np.asarray(t["mag"], float), "row": np.arange(len(t))})
    res.meta["source"] = str(run_dir / f"detections_{band}.fits")
    return res


def _edges(lo, hi, step):
    n = int(np.floor((hi - lo) / step + 1e-9))
    return lo + step * np.arange(n + 1)


def _write_table(path: Path, t: Table) -> None:
    from ..io import atomic_path

    with atomic_path(path) as tmp:
        t.write(tmp, format="ascii.ecsv", overwrite=True)


def default_out_dir(run_dir, catalog, band: str) -> Path:
    """Where scores go by default: ``<run_dir>/score_<file stem>/<band>`` for a catalogue file,
    ``<run_dir>/score_detections_<band>/<band>`` for the run's own detections (``catalog``
    None; the pipeline's own ``<run_dir>/score/<band>`` is left alone),
    ``<run_dir>/score_table/<band>`` for a Table."""
    run_dir = Path(run_dir)
    if catalog is None:
        return run_dir / f"score_detections_{band}" / band
    if isinstance(catalog, Table):
        return run_dir / "score_table" / band
    stem = Path(catalog).name.split(".")[0] or "catalog"
    return run_dir / f"score_{stem}" / band


def _magnitude_check_pairs(m, det, images, ix, iy, mag_img, truth) -> np.ndarray:
    """Which matched pairs may test the magnitude scale: the truth image has no other truth
    image within ISOLATION_ARCSEC brighter than its magnitude + 2.5, and the detection's
    pixel carries no saturated / uncovered flag."""
    from scipy.spatial import cKDTree

    ti = m.truth_index
    usable = np.ones(ti.size, bool)
    if ti.size == 0:
        return usable
    tree = cKDTree(np.column_stack([ix, iy]))
    near = tree.query_ball_point(np.column_stack([ix[ti], iy[ti]]),
                                 ISOLATION_ARCSEC / truth["pixel_scale"])
    for n, (i, nb) in enumerate(zip(ti, near)):
        usable[n] = not any(j != i and mag_img[j] < mag_img[i] + 2.5 for j in nb)
    dq, bits = truth.get("dq"), truth.get("dq_bits")
    if bits:  # stripes are everywhere a little: they do not spoil a source's photometry
        bits &= ~sum(b for b, n in (truth.get("art_causes") or {}).items() if n == "stripe")
    if dq is not None and bits:
        x, y = truth["wcs"].all_world2pix(np.asarray(det["ra"], float)[m.det_index],
                                          np.asarray(det["dec"], float)[m.det_index], 0)
        usable &= (pixel_values(dq, x, y) & bits) == 0
    return usable


def match_to_truth(truth: dict, det, cfg: ScoreConfig):
    """Match a catalogue to the truth images on the mosaic (one to one, :func:`match_sky`).

    Parameters
    ----------
    truth : dict
        From :func:`load_truth`.
    det : Table
        Catalogue with ``ra``, ``dec`` (deg).
    cfg : ScoreConfig
        Match radius settings.

    Returns
    -------
    radius : float (arcsec)
    images : Table
        Truth images on the mosaic.
    ix, iy : ndarray (0-based mosaic pixels)
        Their positions.
    m : MatchResult
        Rows of ``images`` against rows of ``det``.
    """
    radius = match_radius(cfg.match_radius_arcsec, cfg.match_radius_fwhm, truth["psf_fwhm"])
    if not radius > 0:
        raise ConfigError("score.match_radius_arcsec", radius, "must be > 0")
    images = truth["images"]
    ix, iy = np.asarray(images["x"], float), np.asarray(images["y"], float)
    ny, nx = truth["shape"]
    on = (ix >= -0.5) & (ix <= nx - 0.5) & (iy >= -0.5) & (iy <= ny - 0.5)
    images = images[on]
    ix, iy = ix[on], iy[on]
    ra0, dec0 = truth["wcs"].wcs.crval
    m = match_sky(images["ra"], images["dec"], det["ra"], det["dec"], radius,
                  float(ra0), float(dec0))
    return radius, images, ix, iy, m


def source_recovery(source_id, img_source, img_mag, m):
    """Per truth source: recovered (any image matched), its brightest image, its detection.

    Parameters
    ----------
    source_id : ndarray of int
        Truth source ids (SOURCES ``id``).
    img_source : ndarray of int
        Source id of each truth image on the mosaic.
    img_mag : ndarray (AB mag)
        Observed magnitude of each image.
    m : MatchResult
        Images against detections.

    Returns
    -------
    recovered : ndarray of bool
    best_img : ndarray of int
        Row of the brightest image on the mosaic, -1 if none.
    det_for_src : ndarray of int
        Matched detection row, -1 if none.
    """
    pos = {int(s): i for i, s in enumerate(source_id)}
    row = np.array([pos.get(int(s), -1) for s in img_source], np.int64)
    ns = len(source_id)
    recovered = np.zeros(ns, bool)
    recovered[row[(m.truth_to_det >= 0) & (row >= 0)]] = True
    best_img = np.full(ns, -1, np.int64)
    order = np.argsort(img_mag)[::-1]  # faintest first, so the brightest is written last
    ok = row[order] >= 0
    best_img[row[order][ok]] = order[ok]
    det_for_src = np.full(ns, -1, np.int64)
    mi = m.truth_index
    det_for_src[row[mi][row[mi] >= 0]] = m.det_index[row[mi] >= 0]
    return recovered, best_img, det_for_src


def false_detection_causes(truth: dict, det, cfg: ScoreConfig, m, ix, iy, img_source, img_mag,
                           source_id, kind, recovered):
    """Likely cause of every unmatched detection (:func:`metrics.classify_false_detections`,
    then the truth's artefact map at the detections' pixels, which wins).

    Parameters
    ----------
    truth : dict
        From :func:`load_truth`.
    det : Table
        Catalogue with ``ra``, ``dec`` (deg).
    cfg : ScoreConfig
    m : MatchResult
    ix, iy : ndarray (0-based mosaic pixels)
        Truth images on the mosaic.
    img_source : ndarray of int
    img_mag : ndarray (AB mag)
    source_id, kind, recovered : ndarray
        Per truth source: id, kind, recovered flag.

    Returns
    -------
    cause : ndarray of str
        Per detection, ``""`` when matched.
    dx, dy : ndarray (0-based mosaic pixels)
        Detection positions.
    angles : list of float (deg)
        Spike directions used.
    """
    wcs = truth["wcs"]
    dx, dy = wcs.all_world2pix(np.asarray(det["ra"], float), np.asarray(det["dec"], float), 0)
    angles = list(cfg.spike_angles_deg)
    if not angles and truth["psf"] is not None:
        angles = list(metrics.measure_spike_angles(truth["psf"]))
    rec_by_id = {int(s): bool(r) for s, r in zip(source_id, recovered)}
    star_img = np.isin(img_source, source_id[np.isin(kind, POINT_KINDS)])
    # the truth segmentation is a memory map: only the detections' pixels are read. The DQ
    # rule ("artefact") comes first and wins, so it is applied afterwards from the DQ values at
    # those pixels alone, which gives the same causes as passing a masked DQ image.
    cause = metrics.classify_false_detections(
        dx, dy, m.det_to_truth, ix, iy, img_source, img_mag, star_img, rec_by_id,
        truth["pixel_scale"], truth_segm=truth["segm"], dq=None, spike_angles_deg=angles,
        bright_star_mag=cfg.bright_star_mag, spike_ref_mag=cfg.spike_ref_mag,
        spike_length_arcsec=cfg.spike_length_arcsec, halo_radius_arcsec=cfg.halo_radius_arcsec,
        spike_half_width_deg=cfg.spike_half_width_deg,
        blend_radius_arcsec=cfg.blend_radius_arcsec)
    if truth["dq"] is not None and len(dx):
        v = pixel_values(truth["dq"], dx, dy)
        un = m.det_to_truth < 0
        own = truth.get("art_causes") or {}  # truth bits with a cause of their own
        for bit, name in own.items():
            # a stripe only explains what nothing else does; a persistence ghost, like a
            # detector artefact, wins over the rules above
            hit = un & ((v & bit) != 0) & ((cause == "noise") if name == "stripe" else True)
            cause[hit] = name
        other = truth["dq_bits"] & ~sum(own)
        cause[un & ((v & other) != 0)] = "artefact"
    return cause, dx, dy, angles


def score_run(run_dir, catalog, band: str, cfg: ScoreConfig | None = None, out_dir=None,
              columns: dict | None = None, skip_invalid: bool = False, prov=None,
              drop_duplicates: bool = False, allow_flux_offset: bool = False) -> dict:
    """Score a detection catalogue against the truth of one band of a run.

    Parameters
    ----------
    run_dir : str or Path
        Run directory (mosaic, truth, PSF files).
    catalog : str, Path or Table or None
        Catalogue file (read with :func:`load_catalog`), or a Table with ``ra``, ``dec`` (deg)
        and ``mag`` (AB), or None for the run's own ``detections_<band>.fits``.
    band : str
        Band name.
    cfg : ScoreConfig, optional
    out_dir : str or Path, optional
        Default :func:`default_out_dir`.
    columns, skip_invalid, drop_duplicates :
        Passed to :func:`load_catalog`.
    prov : simfield.io.Provenance, optional
        Recorded in the summary.
    allow_flux_offset : bool
        Score a catalogue file whose bright matches are off the truth magnitudes
        (:func:`simfield.score.catalog.check_magnitude_scale`, applied to catalogue files
        only) instead of refusing it.

    Returns
    -------
    dict
        The summary also written to ``summary.json``.
    """
    from ..io import write_json

    cfg = cfg or ScoreConfig()
    _validate_score(cfg)
    truth = load_truth(run_dir, band)
    run_dir = Path(run_dir)
    out = Path(out_dir) if out_dir is not None else default_out_dir(run_dir, catalog, band)
    wcs, shape = truth["wcs"], truth["shape"]
    from_file = catalog is not None and not isinstance(catalog, Table)
    if catalog is None:
        catalog = _own_detections(run_dir, band)
    if isinstance(catalog, Table):
        det = catalog
        for c in ("ra", "dec", "mag"):
            if c not in det.colnames:
                raise CatalogError(f"catalogue table lacks column {c!r}; available: "
                                   f"{', '.join(det.colnames)}")
        cat_name = det.meta.get("source", "<table>")
    else:
        det = load_catalog(catalog, columns, skip_invalid, truth["zeropoint"], (wcs, shape),
                           drop_duplicates)
        cat_name = str(catalog)
    radius, images, ix, iy, m = match_to_truth(truth, det, cfg)
    sources = truth["sources"]
    ny, nx = shape
    img_src = np.asarray(images["source_id"], np.int64)
    mag_img = np.asarray(images[f"mag_{band}"], float)
    mag_check = None
    if from_file:  # refused here, before anything is written
        col = det.meta.get("columns", {})
        mag_check = check_magnitude_scale(
            np.asarray(det["mag"], float)[m.det_index], mag_img[m.truth_index],
            _magnitude_check_pairs(m, det, images, ix, iy, mag_img, truth),
            col.get("mag", col.get("flux", "mag")), allow_flux_offset)

    # ---- per source: recovered if any image matched; observed quantities of the brightest image
    sid = np.asarray(sources["id"], np.int64)
    ns = len(sources)
    recovered, best_img, det_for_src = source_recovery(sid, img_src, mag_img, m)
    best_mag = gather(mag_img, best_img, np.nan)
    has_img = best_img >= 0
    kind = np.asarray(sources["kind"]).astype(str)
    gal = has_img & ~np.isin(kind, POINT_KINDS)
    mu_img = np.abs(np.asarray(images["magnification"], float))
    mu_best = gather(mu_img, best_img, np.nan)
    r_half = np.asarray(sources["r_half"], float) if "r_half" in sources.colnames else \
        np.full(ns, np.nan)
    r_obs = r_half * np.sqrt(mu_best)  # lensing stretches sizes by ~sqrt(|mu|) on average
    sb = metrics.mean_surface_brightness(best_mag, r_obs)
    z = np.asarray(sources["redshift"], float) if "redshift" in sources.colnames else \
        np.full(ns, np.nan)
    lvl = cfg.interval
    mag_edges = _edges(cfg.mag_min, cfg.mag_max, cfg.mag_step)
    tables = {
        "completeness_mag": metrics.binned_fraction(best_mag[gal], recovered[gal], mag_edges,
                                                    lvl, "mag"),
        "completeness_size": metrics.binned_fraction(r_obs[gal], recovered[gal],
                                                     cfg.size_bins_arcsec, lvl, "r_half"),
        "completeness_sb": metrics.binned_fraction(sb[gal], recovered[gal],
                                                   _edges(16.0, 32.0, 0.5), lvl, "sb"),
        "completeness_z": metrics.binned_fraction(z[gal], recovered[gal], cfg.z_bins, lvl, "z"),
        "completeness_mu": metrics.binned_fraction(mu_best[gal], recovered[gal],
                                                   [0.0, 0.9, 1.1, 1.5, 2, 3, 5, 10, 20, 1e4],
                                                   lvl, "mu"),
        "completeness_mag_size": metrics.binned_fraction_2d(
            best_mag[gal], r_obs[gal], recovered[gal], _edges(cfg.mag_min, cfg.mag_max, 1.0),
            cfg.size_bins_arcsec, lvl, ("mag", "r_half")),
    }
    det_mag = np.asarray(det["mag"], float)
    matched = m.det_to_truth >= 0
    tables["purity_mag"] = metrics.binned_fraction(det_mag, matched, mag_edges, lvl, "mag")

    # ---- causes of false detections
    cause, dx, dy, angles = false_detection_causes(truth, det, cfg, m, ix, iy, img_src, mag_img,
                                                   sid, kind, recovered)
    un = ~matched
    false_t = Table({"row": np.flatnonzero(un), "ra": np.asarray(det["ra"], float)[un],
                     "dec": np.asarray(det["dec"], float)[un], "x": dx[un], "y": dy[un],
                     "mag": det_mag[un], "cause": cause[un]})
    tables["false_detections"] = false_t

    # ---- photometry of matched pairs (true = observed magnitude of the matched image)
    tables["photometry"] = metrics.photometric_bias(mag_img[m.truth_index],
                                                    det_mag[m.det_index], mag_edges)

    # ---- effective volume per (M_UV, z) bin: recovered fraction x comoving volume over the field
    if "abs_mag_uv" in sources.colnames:
        sel = kind == "galaxy"
        tables["effective_volume"] = binned_effective_volume(
            np.asarray(sources["abs_mag_uv"], float)[sel], z[sel], recovered[sel],
            _edges(-24.0, -14.0, 1.0), cfg.z_bins, float(nx * ny) * truth["pixel_scale"] ** 2,
            lvl)

    det_row = gather(det["row"] if "row" in det.colnames else np.arange(len(det)), det_for_src,
                     -1)
    rec_t = Table({"id": sid, "kind": kind, "mag_obs": best_mag, "r_half_obs": r_obs,
                   "redshift": z, "magnification": mu_best, "recovered": recovered,
                   "det_row": det_row})
    tables["recovered"] = rec_t[has_img]

    # ---- fits and headline numbers
    fits_ = {}
    for model in ("logistic", "erf"):
        try:
            fits_[model] = metrics.fit_completeness(best_mag[gal], recovered[gal], model)
        except ValueError as exc:
            fits_[model] = str(exc)
    pm = tables["purity_mag"]
    ref = np.flatnonzero((pm["mag_lo"] <= cfg.reference_mag) & (pm["mag_hi"] > cfg.reference_mag))
    counts = {c_: int(np.sum(cause == c_)) for c_ in metrics.FALSE_CAUSES}
    n_det = len(det)
    summary = {
        "band": band, "catalog": cat_name, "match_radius_arcsec": radius,
        "n_truth_galaxies": int(gal.sum()), "n_truth_images_on_mosaic": int(len(images)),
        "n_detections": int(n_det), "n_matched": int(m.truth_index.size),
        "completeness_all": float(recovered[gal].mean()) if gal.any() else None,
        "purity_all": float(matched.mean()) if n_det else None,
        "purity_at_reference_mag": (float(pm["fraction"][ref[0]]) if ref.size else None),
        "reference_mag": cfg.reference_mag,
        "false_detections": counts,
        "completeness_fit": {k: (v.as_dict() if isinstance(v, metrics.CompletenessFit) else
                                 {"error": v}) for k, v in fits_.items()},
        "headline_fit": cfg.fit_model,
        "spike_angles_deg": [float(a) for a in angles],
        "catalog_rows_skipped": int(det.meta.get("n_skipped", 0)),
        "catalog_duplicates_dropped": int(det.meta.get("n_duplicates", 0)),
        "magnitude_check": mag_check,
    }
    injected = fits.getheader(run_dir / f"mosaic_{band}.fits", "IMAGE").get("INJFROM")
    if injected and from_file:
        summary["injected_into"] = str(injected)
        summary["purity_note"] = ("the truth holds only the injected sources: the image's own "
                                  "objects in the catalogue count as unmatched detections")
    # limits the headline fit may quote (metrics module rules); null with a reason otherwise
    head = fits_.get(cfg.fit_model)
    hd = head.as_dict() if isinstance(head, metrics.CompletenessFit) else {}
    for key in ("m50", "m90"):
        summary[key], summary[f"{key}_err"] = hd.get(key), hd.get(f"{key}_err")
        summary[f"{key}_reason"] = hd.get(f"{key}_reason") if hd else f"no fit: {head}"

    # ---- write (all inputs are read and checked by now)
    out.mkdir(parents=True, exist_ok=True)
    for name, t in tables.items():
        t.meta["band"] = band
        t.meta["description"] = SCORE_TABLES[name]
        _write_table(out / f"{name}.ecsv", describe(t, SCORE_COLUMNS))
    if cfg.report:
        from .report import make_report

        summary["report"] = str(make_report(out, truth, det, tables, fits_, summary, band))
    write_json(out / "summary.json", summary, prov)
    return summary


def score_pipeline_run(run_dir, sc, prov) -> dict:
    """Score the run's own detections in every detected band (called by the pipeline).

    Returns
    -------
    dict
        Per band, the summary of :func:`score_run`; written under ``<run_dir>/score/<band>/``.
    """
    bands = sc.detection_bands
    res = {}
    for b in bands:
        res[b] = score_run(run_dir, None, b, sc.score, Path(run_dir) / "score" / b, prov=prov)
        res[b].pop("completeness_fit", None)
    return res


# --------------------------------------------------------------------------------------------
def _parser() -> argparse.ArgumentParser:
    p = OneLineParser(prog="simfield-score", formatter_class=DefaultsHelpFormatter,
                      description="Score a detection catalogue against a simfield run's truth.")
    p.add_argument("run_dir", help="run directory written by simfield")
    p.add_argument("--catalog", help="catalogue file (.fits, .ecsv, .csv) (default: the run's "
                                     "own detections_<band>.fits)")
    p.add_argument("--band", help="band name (default: the run's detection band, from its "
                                  "summary.json or scenario.yaml)")
    p.add_argument("--ra-col", default="ra", help="RA column (deg)")
    p.add_argument("--dec-col", default="dec", help="Dec column (deg)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--mag-col", help="AB magnitude column; NAME[i] picks element i (0-based) "
                                     "of a column with several per row (default: mag, unless "
                                     "--flux-col is given)")
    g.add_argument("--flux-col", help="flux column (see --flux-unit); NAME[i] as for --mag-col "
                                      "(default: none, magnitudes are read)")
    p.add_argument("--flux-unit", default="nJy", choices=list(FLUX_UNITS),
                   help="unit of --flux-col")
    p.add_argument("--radius", type=float, help="match radius in arcsec (default: the run's "
                                                "score.match_radius_arcsec, 0.15 in the "
                                                "standard preset)")
    p.add_argument("--skip-invalid", action="store_true",
                   help="drop rows with NaN/inf or outside the mosaic instead of refusing")
    p.add_argument("--drop-duplicates", action="store_true",
                   help="keep the first of rows within 1 milliarcsec of each other instead of "
                        "refusing")
    p.add_argument("--allow-flux-offset", action="store_true",
                   help="score even if the bright matches' magnitudes are off the truth by "
                        "more than 1 mag (or too few to check)")
    p.add_argument("--out", help="output directory (default: <run_dir>/score_<catalogue file "
                                 "stem>/<band>; the run's own detections: "
                                 "<run_dir>/score_detections_<band>/<band>)")
    p.add_argument("--no-report", action="store_true", help="skip report.html and plots")
    s = p.add_mutually_exclusive_group()
    s.add_argument("--select-col", help="boolean column: the catalogue's own high-redshift "
                                        "selection, scored for each sample's window of the "
                                        "run's selection group (--sample) (default: none)")
    s.add_argument("--zphot-col", help="redshift column: selected where it lies in each "
                                       "sample's window (default: none)")
    p.add_argument("--sample", action="append", help="sample of the run's selection group "
                                                     "(repeatable; default: all)")
    return p


def run_scenario_of(run_dir: Path):
    """The run's ``scenario.yaml`` as a Scenario, or None if absent or not readable."""
    if not (run_dir / "scenario.yaml").is_file():
        return None
    from omegaconf import OmegaConf

    from ..config import to_scenario

    try:
        return to_scenario(OmegaConf.load(run_dir / "scenario.yaml"))
    except Exception:  # a scenario of another version: the caller falls back to defaults
        return None


def run_detection_band(run_dir: Path) -> tuple[str, str]:
    """The band a run detected in, and where that was read (for the message).

    From ``summary.json`` (``detections``), else ``scenario.yaml`` (detection bands of the
    scenario, :attr:`simfield.config.Scenario.detection_bands`), else the only mosaic.

    Raises
    ------
    CatalogError
        None of these decides.
    """
    import json

    try:
        det = json.loads((run_dir / "summary.json").read_text()).get("detections") or {}
    except (OSError, ValueError, AttributeError):
        det = {}
    if det:
        return next(iter(det)), "the run's detection band"
    sc = run_scenario_of(run_dir)
    if sc is not None:
        return sc.detection_bands[0], "the scenario's detection band"
    found = run_bands(run_dir)
    if len(found) == 1:
        return found[0], "the run's only mosaic"
    if not found:
        raise CatalogError(f"run directory {str(run_dir)!r} holds no mosaic_<band>.fits")
    raise CatalogError(f"--band: not given and {str(run_dir)!r} records no detection band; "
                       f"one of {', '.join(found)}")


def score_main_args(argv: list[str]) -> int:
    """Command-line scorer; returns the exit status (0 ok, 2 bad input, nothing written)."""
    import sys

    try:
        a = _parser().parse_args(argv)
        run_dir = Path(a.run_dir)
        if not run_dir.is_dir():
            raise CatalogError(f"run directory {a.run_dir!r} does not exist")
        if a.out:
            check_out_folder(Path(a.out), "--out")
        if a.sample and not (a.select_col or a.zphot_col):
            raise ArgError(f"--sample {a.sample[0]}: picks the samples that --select-col or "
                           f"--zphot-col score; give one of them, or leave --sample out")
        if not (run_dir / COMPLETE_MARKER).is_file():
            raise CatalogError(f"run directory {a.run_dir!r} has no {COMPLETE_MARKER} file: the "
                               f"run did not finish (its files may be partial); relaunch "
                               f"the command that made it to finish it")
        band, why = (a.band, "given") if a.band else run_detection_band(run_dir)
        if a.band and not (run_dir / f"mosaic_{band}.fits").is_file():
            raise ArgError(f"--band: {band!r} is not a band of this run (no mosaic_{band}.fits);"
                           f" one of {', '.join(run_bands(run_dir)) or 'none'}")
        sc = run_scenario_of(run_dir)  # the run's own score settings, where it has them
        cfg = sc.score if sc is not None else ScoreConfig()
        if a.radius is not None:  # the radius asked for, even where the run matched in FWHMs
            cfg.match_radius_arcsec, cfg.match_radius_fwhm = a.radius, 0.0
        cfg.report = not a.no_report
        try:
            _validate_score(cfg)
        except ConfigError as exc:  # a bad --radius is named as the user typed it
            if a.radius is None or exc.key != "score.match_radius_arcsec":
                raise
            raise ArgError(f"--radius: {a.radius:g} {exc.allowed} arcsec") from None
        cols = {"ra": a.ra_col, "dec": a.dec_col}
        if a.flux_col:
            cols.update(flux=a.flux_col, flux_unit=a.flux_unit)
        else:
            cols["mag"] = a.mag_col or "mag"
        if a.select_col or a.zphot_col:
            return _selection_main(a, run_dir, band, sc, cols)
        out = Path(a.out) if a.out else default_out_dir(run_dir, a.catalog, band)
        if not a.out:  # the default folder (--out itself was checked first)
            check_out_folder(out, "the output folder")
        summ = score_run(run_dir, a.catalog, band, cfg, out, cols, a.skip_invalid,
                         drop_duplicates=a.drop_duplicates,
                         allow_flux_offset=a.allow_flux_offset)
    except (ArgError, CatalogError, ConfigError) as exc:
        print(f"simfield-score: error: {exc}", file=sys.stderr)
        return 2
    print(f"simfield-score: band {band} ({why}); {summ['n_matched']} of "
          f"{summ['n_detections']} detections matched; results in {os.fspath(out)}")
    return 0


def _selection_main(a, run_dir: Path, band: str, sc, cols: dict) -> int:
    """``--select-col`` / ``--zphot-col``: score the catalogue's selection (writes
    ``<run_dir>/selection_<catalogue stem>/<sample>/`` or ``--out/<sample>``)."""
    import sys

    from ..selection.run import score_catalogue_selection

    opt = "--select-col" if a.select_col else "--zphot-col"
    if not a.catalog:
        raise CatalogError(f"{opt} needs --catalog (a multi-band catalogue file)")
    if sc is None:
        raise CatalogError(f"{opt}: run directory {str(run_dir)!r} has no readable "
                           f"scenario.yaml (its samples and bands)")
    sc.score.report = sc.selection.report = not a.no_report
    if not a.out:
        check_out_folder(run_dir, "the run directory")
    res = score_catalogue_selection(run_dir, a.catalog, sc, band, a.select_col, a.zphot_col,
                                    a.sample, a.out, {"ra": cols["ra"], "dec": cols["dec"]})
    print("simfield-score: selection " + "; ".join(
        f"{k}: {v['n_selected']} selected, {v['contamination']['in_window']} in window"
        for k, v in res.items()), file=sys.stdout)
    return 0
