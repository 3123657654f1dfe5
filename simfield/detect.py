"""Baseline source detector run on a mosaic (photutils underneath).

Steps: a background map (sigma-clipped medians on a mesh, median-filtered, interpolated), a
matched filter (a circular Gaussian of the PSF FWHM), a segmentation of the filtered image above
``threshold_sigma`` times the per-pixel noise of the unfiltered image (the usual practice of
photutils and of similar detectors), deblending by multi-thresholding, then photometry in a
circular aperture, in the isophotal footprint and in a Kron aperture.

:func:`detect_sources` works on arrays in memory; :func:`detect_mosaic` runs it on a mosaic file
tile by tile (cores of at most :data:`TILE_CORE_PIX` with :data:`TILE_MARGIN_PIX` of overlap),
so memory is bounded by the tile, not the mosaic; :func:`run_detection` writes the catalogue and
the segmentation (by sections) of each detected band of a run.

Units: images in e-/s, the inverse-variance weight in (e-/s)^-2, fluxes in e-/s (and nJy),
magnitudes AB, pixel positions 0-based (pixel centre at integers, see :mod:`simfield.grid`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.table import Table
from astropy.wcs import WCS

from .bands import AB_NJY_ZERO
from .config import DetectionConfig
from .errors import ConfigError, check_range, require

__all__ = ["Detections", "detect_sources", "matched_filter", "detect_mosaic", "run_detection",
           "tile_bounds", "TILE_CORE_PIX", "TILE_MARGIN_PIX", "SEAM_MATCH_PIX", "SEGM_MATCH_PIX"]

# 2.5 / ln(10): magnitude error per unit fractional flux error
_MAG_PER_FRAC = 2.5 / np.log(10.0)

# numpy dtype of each FITS BITPIX (FITS data are big-endian)
_FITS_DTYPE = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}

#: Largest tile core side (pixels). A tile of core + 2 margins, 3072 + 512 = 3584 pixels a side,
#: holds 12.8 Mpix; detect_sources keeps ~15 float64 arrays of that size, ~1.5 GB at most.
TILE_CORE_PIX = 3072
#: Overlap on every side of a core (pixels): 256 px = 10.2" at 0.04"/pix, 3.4 background meshes
#: of the default 3" and several times a typical footprint (~1" across).
TILE_MARGIN_PIX = 256
#: Two tiles' detections closer than this (pixels) are one object measured twice at a seam.
SEAM_MATCH_PIX = 0.25
#: A footprint owned by another tile takes the id of the kept detection within this (pixels).
SEGM_MATCH_PIX = 1.0


@dataclass(frozen=True)
class Detections:
    """Result of :func:`detect_sources`.

    Attributes
    ----------
    catalog : astropy.table.Table
        One row per detection (columns in :func:`detect_sources`).
    segmentation : ndarray of int, shape (ny, nx)
        Detection footprint labels; 0 is background, label ``i`` is row with ``id == i``.
    background : ndarray (e-/s)
        Background map that was subtracted.
    """

    catalog: Table
    segmentation: np.ndarray
    background: np.ndarray


def _segment_flags(seg: np.ndarray, labels: np.ndarray, flags) -> np.ndarray:
    """OR of ``flags`` over the pixels of each segment ``labels`` (0 without flags)."""
    out = np.zeros(labels.size, np.int32)
    if flags is None or labels.size == 0:
        return out
    flags = np.asarray(flags)
    n = int(seg.max()) + 1
    for bit in range(16):
        on = (flags & (1 << bit)) != 0
        if on.any():
            hit = np.bincount(seg[on].ravel(), minlength=n) > 0
            out |= np.where(hit[labels], 1 << bit, 0).astype(np.int32)
    return out


def _columns_empty(meta) -> Table:
    t = Table(names=("id", "x", "y", "ra", "dec", "flux", "flux_err", "flux_njy", "mag",
                     "mag_err", "flux_aper", "flux_aper_err", "mag_aper", "flux_iso",
                     "flux_iso_err", "area", "snr", "a_arcsec", "b_arcsec", "theta_deg",
                     "kron_radius", "flags"),
              dtype=[int] + [float] * 20 + [np.int32])
    t.meta.update(meta)
    return t


def matched_filter(image: np.ndarray, bad: np.ndarray, fwhm_pix: float) -> np.ndarray:
    """``image`` convolved with a unit-sum circular Gaussian of FWHM ``fwhm_pix`` (pixels;
    photutils' ``make_2dgaussian_kernel``, odd size ~4 FWHM), with zeros beyond the edges and
    at ``bad`` pixels (bool), which are 0 in the result.

    A linear convolution by overlap-add FFTs (``scipy.signal.oaconvolve``): equal to astropy's
    ``convolve_fft`` with the bad pixels masked and the boundary and masked pixels filled
    with 0 (tests/test_detect.py), ~10x faster on 2500^2 pixels (its padded complex FFTs).
    """
    from photutils.segmentation import make_2dgaussian_kernel
    from scipy import signal

    size = int(2 * np.ceil(2.0 * fwhm_pix) + 1)
    k = np.asarray(make_2dgaussian_kernel(fwhm_pix, size=max(size, 3)).array, dtype=float)
    conv = signal.oaconvolve(np.where(bad, 0.0, image), k / k.sum(), mode="same")
    conv[bad] = 0.0
    return conv


def detect_sources(sci, wht, wcs: WCS, cfg: DetectionConfig, psf_fwhm_arcsec: float,
                   zeropoint: float, pixel_scale_arcsec: float, exptime: float | None = None,
                   mask=None, noise_table=None, flags=None, processes: int = 1) -> Detections:
    """Detect and measure sources on one mosaic.

    Parameters
    ----------
    sci : ndarray (e-/s), shape (ny, nx)
        Science image.
    wht : ndarray ((e-/s)^-2), shape (ny, nx)
        Inverse-variance weight; pixels with ``wht <= 0`` are treated as not covered.
    wcs : astropy.wcs.WCS
        Celestial WCS of the mosaic.
    cfg : DetectionConfig
        Detection settings.
    psf_fwhm_arcsec : float (arcsec)
        PSF FWHM, used for the matched filter when ``cfg.kernel_fwhm_arcsec == 0``.
    zeropoint : float (AB mag)
        Magnitude of a 1 e-/s source.
    pixel_scale_arcsec : float (arcsec/pixel)
        Mosaic pixel side.
    exptime : float (s), optional
        Effective exposure time; when given, the Poisson noise of the sources (gain = exptime
        electrons per e-/s) is added to the flux errors.
    mask : ndarray of bool, optional
        Pixels to ignore (e.g. data-quality flags set).
    flags : ndarray of int, optional
        The mosaic's flag image: each detection's ``flags`` column is the OR of the flags of
        the pixels of its segment (a saturated or partly missing star says so).
    noise_table : tuple or None
        The mosaic's aperture noise table (:func:`simfield.noisecards.read_noise_factors`):
        every flux error is multiplied by the factor F at the radius of its footprint
        (circular aperture: its radius; Kron ellipse and isophotal area: the radius of a
        circle of the same area), since the pixels of a drizzled mosaic are correlated.
        None: errors from the pixel variances alone.
    processes : int
        Local processes for the deblending (:func:`simfield.deblend.deblend`: the same
        segmentation with any number).

    Returns
    -------
    Detections
        Catalogue (columns ``id``; ``x``, ``y`` 0-based pixels; ``ra``, ``dec`` deg; ``flux``,
        ``flux_err`` Kron flux in e-/s; ``flux_njy`` nJy; ``mag``, ``mag_err`` AB;
        ``flux_aper``, ``flux_aper_err`` in the circular aperture (e-/s); ``mag_aper``;
        ``flux_iso``, ``flux_iso_err`` isophotal (e-/s); ``area`` isophotal area (pixels);
        ``snr`` = flux / flux_err; ``a_arcsec``, ``b_arcsec``, ``theta_deg`` moments ellipse;
        ``kron_radius`` in first-moment radii; ``flags`` OR of the mosaic flags over the
        segment), the segmentation image and the background.
    """
    from photutils.background import Background2D, MedianBackground
    from photutils.segmentation import SourceCatalog
    from photutils.segmentation import detect_sources as _segment
    from photutils.utils import NoDetectionsWarning, calc_total_error

    from .deblend import deblend

    sci = np.asarray(sci, dtype=float)
    wht = np.asarray(wht, dtype=float)
    if sci.shape != wht.shape or sci.ndim != 2:
        raise ConfigError("wht", wht.shape, f"must be 2-D with the shape of sci {sci.shape}")
    check_range("psf_fwhm_arcsec", psf_fwhm_arcsec, 0, 60, lo_open=True)
    check_range("pixel_scale_arcsec", pixel_scale_arcsec, 0, 60, lo_open=True)
    require(np.isfinite(zeropoint), "zeropoint", zeropoint, "must be finite")

    bad = ~np.isfinite(sci) | ~np.isfinite(wht) | (wht <= 0)
    if mask is not None:
        bad |= np.asarray(mask, dtype=bool)
    meta = {"PIXORIG": "0-based pixel coordinates (centre of first pixel = 0)",
            "ZP_AB": float(zeropoint), "FLUXUNIT": "e-/s"}
    ny, nx = sci.shape
    if bad.all():
        return Detections(_columns_empty(meta), np.zeros(sci.shape, int), np.zeros(sci.shape))
    data = np.where(bad, 0.0, sci)
    rms = np.where(bad, np.inf, 1.0 / np.sqrt(np.where(wht > 0, wht, 1.0)))

    # --- background: mesh of ~background_box_arcsec, at most a quarter of the image
    box = int(round(cfg.background_box_arcsec / pixel_scale_arcsec))
    box = max(8, min(box, max(ny, nx) // 4 if max(ny, nx) >= 32 else max(ny, nx)))
    bkg = Background2D(data, box, coverage_mask=bad, fill_value=0.0,
                       filter_size=(int(cfg.background_filter),) * 2,
                       bkg_estimator=MedianBackground(), exclude_percentile=50.0)
    back = np.where(bad, 0.0, bkg.background)
    sub = np.where(bad, 0.0, data - back)

    # --- matched filter: unit-sum circular Gaussian of the PSF FWHM, size ~ 4 FWHM (odd)
    fwhm_pix = (cfg.kernel_fwhm_arcsec or psf_fwhm_arcsec) / pixel_scale_arcsec
    conv = matched_filter(sub, bad, fwhm_pix)

    threshold = cfg.threshold_sigma * np.where(bad, np.inf, rms)
    with warnings.catch_warnings():  # "no sources found" is an answer here, not a warning
        warnings.simplefilter("ignore", NoDetectionsWarning)
        segm = _segment(conv, threshold, n_pixels=int(cfg.npixels), mask=bad)
    if segm is None:
        return Detections(_columns_empty(meta), np.zeros(sci.shape, int), back)
    if cfg.deblend and segm.n_labels > 0:
        segm = deblend(conv, segm, cfg.npixels, cfg.nlevels, cfg.contrast, processes)

    if exptime is not None and exptime > 0:
        error = calc_total_error(sub, np.where(bad, 0.0, rms), float(exptime))
    else:
        error = np.where(bad, 0.0, rms)
    cat = SourceCatalog(sub, segm, convolved_data=conv, error=error, mask=bad, wcs=wcs,
                        kron_params=(float(cfg.kron_factor), float(cfg.kron_min_radius), 0.0))
    r_ap = cfg.aperture_radius_arcsec / pixel_scale_arcsec
    f_ap, e_ap = cat.circular_photometry(r_ap)
    f_kr, e_kr = cat.kron_flux, cat.kron_flux_err
    f_iso, e_iso = cat.segment_flux, cat.segment_flux_err
    if noise_table is not None:  # correlated pixels: scale each error by F at its size
        from .noisecards import noise_factor

        ab = np.sqrt(np.asarray(cat.semimajor_axis.value, float)
                     * np.asarray(cat.semiminor_axis.value, float))
        r_kron = np.asarray(cat.kron_radius.value, float) * ab
        r_iso = np.sqrt(np.asarray(cat.area.value, float) / np.pi)
        e_ap = np.asarray(e_ap, float) * noise_factor(noise_table, r_ap)
        e_kr = np.asarray(e_kr, float) * noise_factor(noise_table, np.nan_to_num(r_kron))
        e_iso = np.asarray(e_iso, float) * noise_factor(noise_table, r_iso)
    x, y = np.asarray(cat.x_centroid, float), np.asarray(cat.y_centroid, float)
    ra, dec = wcs.all_pix2world(x, y, 0)

    def _mag(f):
        f = np.asarray(f, float)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(f > 0, zeropoint - 2.5 * np.log10(np.where(f > 0, f, 1.0)), np.nan)

    flux = np.asarray(f_kr, float)
    flux_err = np.asarray(e_kr, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = flux / flux_err
        mag_err = np.where(flux > 0, _MAG_PER_FRAC * flux_err / np.abs(flux), np.nan)
    t = Table()
    t["id"] = np.asarray(cat.labels, int)
    t["x"], t["y"] = x, y
    t["ra"], t["dec"] = np.asarray(ra, float) % 360.0, np.asarray(dec, float)
    t["flux"], t["flux_err"] = flux, flux_err
    # e-/s -> nJy: 1 e-/s is ZP AB, i.e. 10^(-0.4 (ZP - 31.4)) nJy
    t["flux_njy"] = flux * 10.0 ** (-0.4 * (zeropoint - AB_NJY_ZERO))
    t["mag"], t["mag_err"] = _mag(flux), mag_err
    t["flux_aper"], t["flux_aper_err"] = np.asarray(f_ap, float), np.asarray(e_ap, float)
    t["mag_aper"] = _mag(f_ap)
    t["flux_iso"], t["flux_iso_err"] = np.asarray(f_iso, float), np.asarray(e_iso, float)
    t["area"] = np.asarray(cat.area.value, float)
    t["snr"] = snr
    t["a_arcsec"] = np.asarray(cat.semimajor_axis.value, float) * pixel_scale_arcsec
    t["b_arcsec"] = np.asarray(cat.semiminor_axis.value, float) * pixel_scale_arcsec
    t["theta_deg"] = np.asarray(cat.orientation.value, float)
    t["kron_radius"] = np.asarray(cat.kron_radius.value, float)
    t["flags"] = _segment_flags(segm.data, np.asarray(cat.labels, int), flags)
    # e-/s columns carry no astropy unit (FITS has no "electron"); FLUXUNIT in meta says it
    units = {"x": "pix", "y": "pix", "ra": "deg", "dec": "deg",
             "flux_njy": "nJy", "mag": "mag", "mag_err": "mag", "mag_aper": "mag",
             "area": "pix2",
             "a_arcsec": "arcsec", "b_arcsec": "arcsec", "theta_deg": "deg"}
    for k, u in units.items():
        t[k].unit = u
    meta.update({"APER_AS": float(cfg.aperture_radius_arcsec), "KERNFWHM": float(fwhm_pix),
                 "THRESH": float(cfg.threshold_sigma)})
    t.meta.update(meta)
    return Detections(t, np.asarray(segm.data, dtype=np.int32), back)


def tile_bounds(n: int, core: int, margin: int, align: int = 1) -> list[tuple[int, int, int, int]]:
    """Split ``n`` pixels into equal cores with overlap margins (one axis).

    Parameters
    ----------
    n : int (pixels)
        Length of the mosaic axis.
    core : int (pixels)
        Largest core length; ``ceil(n / core)`` cores of (nearly) equal length are made, so a
        mosaic not longer than ``core`` is one tile.
    margin : int (pixels)
        Overlap on each side of a core (clipped at the mosaic edges).
    align : int (pixels)
        The lower edge of each tile is moved down to a multiple of ``align`` (the background
        mesh), so the background meshes of a tile coincide with those of the whole mosaic.

    Returns
    -------
    list of (lo, c0, c1, hi)
        Tile ``[lo, hi)`` holding the core ``[c0, c1)``; cores cover ``[0, n)`` exactly once.
    """
    n_tiles = max(1, -(-n // core))
    edges = [(i * n) // n_tiles for i in range(n_tiles + 1)]
    out = []
    for c0, c1 in zip(edges[:-1], edges[1:]):
        lo = max(0, ((c0 - margin) // align) * align)
        out.append((lo, c0, c1, min(n, c1 + margin)))
    return out


def _stack(cats: list[Table]) -> Table:
    from astropy.table import vstack

    full = [c for c in cats if len(c)]
    if not full:
        return cats[0] if cats else _columns_empty({})
    if len(full) == 1:
        return full[0]
    out = vstack(full, metadata_conflicts="silent")
    out.meta = dict(full[0].meta)
    return out


def _window(path, loc: int, shape, dtype, win) -> np.ndarray:
    """Copy of ``win`` of an image stored at byte ``loc`` of ``path``, read through a memory
    map opened for this window only (unmapped on return, so the file's pages do not stay in
    the process's resident memory from tile to tile)."""
    mm = np.memmap(path, dtype=dtype, mode="r", offset=loc, shape=shape)
    out = np.array(mm[win])
    del mm
    return out


@dataclass(frozen=True)
class _TileJob:
    """What a detection tile needs from its mosaic (picklable; see :func:`_detect_tile`)."""

    path: Path
    maps: dict  #: extension -> (byte offset, shape, dtype)
    no_cov: int
    wcs: WCS
    one: bool
    cfg: DetectionConfig
    fwhm: float
    zp: float
    scale: float
    exptime: float | None
    shape: tuple[int, int]
    want_segm: bool
    noise_table: tuple | None = None


def _detect_tile(job: _TileJob, tile, processes: int = 1):
    """:func:`detect_sources` on one tile of ``job``'s mosaic. Returns the tile's catalogue
    (mosaic pixel positions), its photutils labels, which rows the tile owns (centroid pixel
    in its core), the positions, the core's segmentation (tile labels, or None) and the
    number of labels."""
    (ylo, y0, y1, yhi), (xlo, x0, x1, xhi) = tile
    ny, nx = job.shape
    win = (slice(ylo, yhi), slice(xlo, xhi))
    flags = None if "FLAGS" not in job.maps else _window(job.path, *job.maps["FLAGS"], win)
    mask = None if flags is None else (flags & job.no_cov) != 0
    twcs = job.wcs if job.one else job.wcs.slice(win)
    det = detect_sources(_window(job.path, *job.maps["IMAGE"], win).astype(float),
                         _window(job.path, *job.maps["INVVAR"], win).astype(float),
                         twcs, job.cfg, job.fwhm, job.zp, job.scale, exptime=job.exptime,
                         mask=mask, noise_table=job.noise_table, flags=flags,
                         processes=processes)
    cat = det.catalog
    gx = np.asarray(cat["x"], float) + xlo
    gy = np.asarray(cat["y"], float) + ylo
    px = np.clip(np.floor(gx + 0.5), 0, nx - 1)
    py = np.clip(np.floor(gy + 0.5), 0, ny - 1)
    own = (px >= x0) & (px < x1) & (py >= y0) & (py < y1)
    labels = np.asarray(cat["id"], np.int64)
    cat["x"], cat["y"] = gx, gy
    seg = np.ascontiguousarray(det.segmentation[y0 - ylo:y1 - ylo, x0 - xlo:x1 - xlo],
                               dtype=np.int32) if job.want_segm else None
    return cat, labels, own, gx, gy, seg, int(det.segmentation.max(initial=0))


def _detect_task(ctx: tuple, i: int):
    """:func:`_detect_tile` of tile ``i`` of ``ctx = (job, tiles)`` (a Dask task)."""
    job, tiles = ctx
    return _detect_tile(job, tiles[i])


def _map_detect(job: _TileJob, tiles: list, workers: int, engine=None, store=None):
    """:func:`_detect_tile` over ``tiles`` in order; a generator, so results are used as they
    arrive. Results an earlier launch kept in ``store`` (:class:`simfield.resume.ResultStore`)
    are read back; the others are computed (:func:`_compute_tiles`) and kept there."""
    todo = [i for i in range(len(tiles)) if store is None or not store.done(i)]
    new = _compute_tiles(job, [tiles[i] for i in todo], workers, engine)
    todo = set(todo)
    for i in range(len(tiles)):
        if i not in todo:
            yield store.result(i)
            continue
        r = next(new)
        if store is not None:
            store.record(i, r)
        yield r


def _compute_tiles(job: _TileJob, tiles: list, workers: int, engine=None):
    """:func:`_detect_tile` over ``tiles`` in order, in ``workers`` forked processes (0: one
    per core, at most one per tile), or as tasks of a Dask ``engine``
    (:class:`simfield.engine.DaskEngine`, which reads the mosaic from the run folder)."""
    import multiprocessing
    import os
    from concurrent.futures import ProcessPoolExecutor
    from functools import partial

    if not tiles:
        return
    if engine is not None:
        yield from engine.imap(_detect_task, (job, tiles), len(tiles),
                               desc=f"detect {job.path.name}")
        return
    n = min(len(tiles), os.cpu_count() or 1) if workers == 0 else min(workers, len(tiles))
    if n <= 1:
        # one tile: its deblending may use the local processes the tiles do not
        local = (os.cpu_count() or 1) if workers == 0 else workers
        apart = local if len(tiles) == 1 else 1
        yield from (_detect_tile(job, t, apart) for t in tiles)
        return
    from ._procs import die_with_parent

    with ProcessPoolExecutor(n, mp_context=multiprocessing.get_context("fork"),
                             initializer=die_with_parent, initargs=(os.getpid(),)) as pool:
        yield from pool.map(partial(_detect_tile, job), tiles)


def detect_mosaic(path, segm_out, cfg: DetectionConfig, psf_fwhm_arcsec: float,
                  core: int | None = None, margin: int | None = None,
                  progress: bool = False, workers: int = 1, engine=None,
                  store=None) -> Table:
    """Detect sources on a mosaic file tile by tile, in memory bounded by the tile size.

    The mosaic (``IMAGE``, ``INVVAR`` and, if present, ``FLAGS`` extensions) is opened as a memory map
    and cut into square tiles: cores of at most ``core`` pixels a side covering the mosaic once
    (:func:`tile_bounds`; a mosaic not larger than one core is one tile and gives exactly the
    result of :func:`detect_sources` on the whole image, the reference implementation, which
    is photutils underneath), each read with ``margin`` pixels more on every side. Each tile
    is run through :func:`detect_sources`.

    Seam rule (common practice for tiled source extraction): a detection belongs to the tile
    whose core holds its centroid's pixel (``round(x)``, ``round(y)``, clipped to the mosaic),
    so each object is kept by exactly one tile; a detection kept by two tiles with centroids
    within :data:`SEAM_MATCH_PIX` of each other (the two tiles' measurements of one object
    falling on either side of a pixel edge) is kept once, from the earlier tile. Kept
    detections are numbered 1..N in tile order (rows of tiles from the bottom, then columns)
    and, within a tile, by photutils label. The segmentation is written in each tile's core
    only; a footprint there whose detection was kept by another tile takes the id of the kept
    detection whose centroid lies within :data:`SEGM_MATCH_PIX` of the footprint's centroid as
    measured in this tile (0 if there is none). Footprints larger than the margin are cut at
    the tile edge and measured on the part inside it.

    Parameters
    ----------
    path : path
        Mosaic file (IMAGE in e-/s with a celestial WCS, ``ZP_AB`` and optionally ``EXPTIME``
        in its header; INVVAR in (e-/s)^-2 with the aperture noise table; FLAGS int with
        ``FNODATA``).
    segm_out : simfield.io.SectionFile, ndarray of int32, shape (ny, nx), or None
        Written with the segmentation labels (the catalogue ids): a SectionFile with a ``SEGMAP``
        extension is written through a fresh memory map per section (so written pages leave
        the resident memory); None skips it.
    cfg : DetectionConfig
        Detection settings.
    psf_fwhm_arcsec : float (arcsec)
        PSF FWHM for the matched filter.
    progress : bool
        Show a progress bar over the tiles.
    core, margin : int (pixels), optional
        Tile core side and overlap; default :data:`TILE_CORE_PIX`, :data:`TILE_MARGIN_PIX`.
    workers : int
        Processes for the tiles (0: one per core; never more than the tiles). Each holds one
        tile (~1.2 GB for a full 3072-pixel core), and the result does not depend on it.
    engine : simfield.engine.DaskEngine, optional
        Run the tiles as tasks of this Dask cluster instead of ``workers`` processes (its
        workers read the mosaic at ``path``, so it must be on a filesystem they share); the
        result is the same.
    store : simfield.resume.ResultStore, optional
        Keep each tile's result there, and read back the tiles an earlier launch of the same
        run kept (the result is the same).

    Returns
    -------
    astropy.table.Table
        The catalogue of :func:`detect_sources` with mosaic pixel positions and ids 1..N.
    """
    from astropy.io import fits
    from scipy.spatial import cKDTree

    core = int(core or TILE_CORE_PIX)
    margin = int(TILE_MARGIN_PIX if margin is None else margin)
    check_range("core", core, 16, 1 << 20)
    check_range("margin", margin, 0, 1 << 20)
    with fits.open(path, memmap=True) as hl:
        hdr = hl["IMAGE"].header
        maps = {}
        for ext in ("IMAGE", "INVVAR", "FLAGS"):
            if ext in hl:
                h = hl[ext].header
                plain = float(h.get("BSCALE", 1)) == 1 and float(h.get("BZERO", 0)) == 0
                require(type(hl[ext]) is fits.ImageHDU and plain and h["BITPIX"] in _FITS_DTYPE,
                        ext, type(hl[ext]).__name__,
                        "must be an uncompressed image extension without BSCALE/BZERO")
                maps[ext] = (hl.fileinfo(hl.index_of(ext))["datLoc"],
                             (int(h["NAXIS2"]), int(h["NAXIS1"])), _FITS_DTYPE[h["BITPIX"]])
        require("IMAGE" in maps and "INVVAR" in maps, "mosaic", str(path), "needs IMAGE and INVVAR")
        # only pixels that no exposure reached are left out of detection (the other mosaic
        # flags say how well a value is measured, and it is still a measurement)
        no_cov = int(hl["FLAGS"].header.get("FNODATA", 1)) if "FLAGS" in maps else 0
        from .noisecards import read_noise_factors

        noise_table = read_noise_factors(hl["INVVAR"].header)
        wcs = WCS(hdr).celestial
        scale = float(np.sqrt(abs(np.linalg.det(wcs.pixel_scale_matrix))) * 3600.0)
        zp = float(hdr["ZP_AB"])
        exptime = float(hdr.get("EXPTIME", 0)) or None
        ny, nx = maps["IMAGE"][1]
        segm_file = segm_out if hasattr(segm_out, "array") else None
        box = max(8, int(round(cfg.background_box_arcsec / scale)))
        ty = tile_bounds(ny, core, margin, box)
        tx = tile_bounds(nx, core, margin, box)
        one = len(ty) == 1 and len(tx) == 1
        kept, provisional = [], []  # per tile: kept rows; (label offset, labels, kept, x, y)
        offset = 0
        from tqdm import tqdm

        tiles = [(yb, xb) for yb in ty for xb in tx]
        job = _TileJob(Path(path), maps, no_cov, wcs, one, cfg, psf_fwhm_arcsec, zp, scale,
                       exptime, (ny, nx), segm_out is not None, noise_table)
        bar = tqdm(total=len(tiles), desc=f"detect {Path(path).name}", unit="tile",
                   disable=not progress, leave=False)
        for (yb, xb), (cat, labels, own, gx, gy, seg, n_labels) in zip(
                tiles, _map_detect(job, tiles, workers, engine, store)):
            kept.append(cat[own])
            provisional.append((offset, labels, own, gx, gy))
            if seg is not None:
                (_, y0, y1, _), (_, x0, x1, _) = yb, xb
                out = segm_file.array("SEGMAP") if segm_file else segm_out
                out[y0:y1, x0:x1] = np.where(seg > 0, seg + offset, 0)
                del out
            offset += n_labels
            bar.update()
        bar.close()

        # ---- seam duplicates, then global ids in tile order
        tile_of = np.concatenate([np.full(len(c), i) for i, c in enumerate(kept)]) \
            if kept else np.zeros(0, int)
        cat = _stack(kept)
        xy = np.column_stack([np.asarray(cat["x"], float), np.asarray(cat["y"], float)])
        drop = np.zeros(len(cat), bool)
        if not one and len(cat) > 1:
            for i, j in sorted(cKDTree(xy).query_pairs(SEAM_MATCH_PIX)):
                if tile_of[i] != tile_of[j]:
                    drop[max(i, j)] = True  # rows are in tile order: the later tile's copy
        keep_rows = np.flatnonzero(~drop)
        cat = cat[keep_rows]
        ids = np.arange(1, len(cat) + 1)
        # provisional label -> global id
        lut = np.zeros(offset + 1, np.int32)
        start = 0
        tree = cKDTree(xy[keep_rows]) if len(keep_rows) else None
        gid_of_row = np.zeros(len(xy), np.int32)
        gid_of_row[keep_rows] = ids
        if drop.any():  # a dropped seam copy's footprint takes the id of the copy kept
            k = tree.query(xy[drop])[1]
            gid_of_row[drop] = ids[k]
        for off, labels, own, gx, gy in provisional:
            n_own = int(own.sum())
            lut[off + labels[own]] = gid_of_row[start:start + n_own]
            start += n_own
            other = ~own
            if tree is not None and other.any():
                d, k = tree.query(np.column_stack([gx[other], gy[other]]),
                                  distance_upper_bound=SEGM_MATCH_PIX)
                lut[off + labels[other]] = np.where(np.isfinite(d),
                                                    ids[np.minimum(k, len(ids) - 1)], 0)
        cat["id"] = ids
        ra, dec = wcs.all_pix2world(np.asarray(cat["x"], float), np.asarray(cat["y"], float), 0)
        cat["ra"], cat["dec"] = np.asarray(ra, float) % 360.0, np.asarray(dec, float)
        cat.meta.update({"PIXORIG": "0-based pixel coordinates (centre of first pixel = 0)",
                         "ZP_AB": zp, "FLUXUNIT": "e-/s", "TILECORE": int(core),
                         "TILEMARG": int(margin), "NTILES": len(ty) * len(tx)})
        if segm_out is not None:
            rows = max(1, (1 << 22) // max(nx, 1))  # ~16 MB of int32 per block
            for r0 in range(0, ny, rows):
                out = segm_file.array("SEGMAP") if segm_file else segm_out
                out[r0:r0 + rows] = lut[np.asarray(out[r0:r0 + rows])]
                del out
    return cat


def run_detection(run_dir, sc, bands, prov, progress: bool = False, workers: int = 1,
                  engine=None, resume=None) -> dict:
    """Run :func:`detect_mosaic` on each mosaic of a run directory; write
    ``detections_<band>.fits``.

    The file holds the primary header (provenance, ``BAND``), the ``SEGMAP`` image (int32
    labels = catalogue ids, with the mosaic WCS; written by sections through a memory map, see
    :func:`simfield.io.section_files`) and the ``DETECTIONS`` table (appended last); read both
    by name.

    Parameters
    ----------
    run_dir : path
        Run directory holding ``mosaic_<band>.fits`` and ``psf_<band>.fits``.
    sc : simfield.config.Scenario
        The scenario (``sc.detection`` is used; bands from ``sc.detection_bands``).
    bands : list of simfield.bands.Band
        The scenario's bands.
    prov : simfield.io.Provenance
        Provenance written into every file.
    progress : bool
        Progress bars over each mosaic's tiles.
    workers : int
        Processes for each mosaic's tiles (see :func:`detect_mosaic`).
    engine : simfield.engine.DaskEngine, optional
        Run each mosaic's tiles on this Dask cluster instead (see :func:`detect_mosaic`).
    resume : path, optional
        The run's resume folder (:func:`simfield.resume.resume_folder`): each band's tile
        results are kept in ``detect_<band>/`` there, and a relaunch detects only the tiles
        an earlier launch did not finish.

    Returns
    -------
    dict
        Number of detections per band.
    """
    from astropy.io import fits

    from .io import ImageSpec, section_files
    from .resume import ResultStore

    run_dir = Path(run_dir)
    cfg = sc.detection
    counts = {}
    for name in sc.detection_bands:
        mpath = run_dir / f"mosaic_{name}.fits"
        with fits.open(mpath, memmap=True) as hl:
            hdr = hl["IMAGE"].header.copy()
            shape = hl["IMAGE"].data.shape
        wcs = WCS(hdr).celestial
        with fits.open(run_dir / f"psf_{name}.fits") as hl:
            fwhm = float(hl["PSF_DET" if "PSF_DET" in hl else 1].header["FWHM"])
        spec = ImageSpec("SEGMAP", shape, np.int32, wcs.to_header())
        out = run_dir / f"detections_{name}.fits"
        with section_files([(out, [spec], [("BAND", name, "simfield band name")])],
                           prov) as (sf,):
            store = None if resume is None else ResultStore(Path(resume) / f"detect_{name}")
            cat = detect_mosaic(mpath, sf, cfg, fwhm, progress=progress, workers=workers,
                                engine=engine, store=store)
            cat.meta.update({"BAND": name})
            tab = fits.BinTableHDU(cat, name="DETECTIONS")
            for key, value, comment in prov.header_cards():
                tab.header[key] = (value, comment)
            with fits.open(sf.path, mode="append") as hl:
                hl.append(tab)
        counts[name] = int(len(cat))
    return counts
