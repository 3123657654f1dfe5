"""What a run will take before it starts: pixels, files, disk and memory; refusals up front.

An edge module like :mod:`simfield.pipeline`: it may call the stages' pure functions (grids,
the expected source count), no stage imports it. :func:`estimate` predicts a scenario's
resources without drawing or writing anything; :func:`check_run` refuses (ConfigError naming
the key to change) a run that would fail or exceed ``limits`` after work had started.

Calibration (2026-12-04, 2-core development machine; disk = ``du -sb`` of the run folder,
peak = summed PSS of the run and its worker processes sampled every 0.25 s):

==========================================  ==========  ==========  =========  =========
run                                         disk        estimate    peak PSS   estimate
==========================================  ==========  ==========  =========  =========
8" x 8", one band (tests/test_resources.py)  (15%, test)
``survey=quick``                            47.68 MB    47.05 MB    0.96 GB    0.96 GB
``survey=quick workers=1``                  47.68 MB    47.05 MB    0.57 GB    0.56 GB
default, ``workers=1``                      870.4 MB    869.8 MB    1.57 GB    1.56 GB
default (2 local processes)                 870.4 MB    869.8 MB    2.43 GB    2.56 GB
==========================================  ==========  ==========  =========  =========

Disk is the image bytes (exact: each extension's pixels times its type's size, plus the
measured header blocks), the PSF files (exact, :func:`_psf_file_bytes`) and, fitted to the
quick and default runs, constants and per-candidate-source terms for the truth table, the
photo-z file, the score folder (its mosaic preview grows with the mosaic up to a cap), the
selection's sample folders and the small files (``psf.png`` ~1 MB). Memory is the largest of
two phases. The tile and detection phases: a base (interpreter, libraries, PSFs) plus the
parent's share per mosaic pixel, plus the larger of the tile phase (processes x
:data:`TILE_BYTES_PER_SCENE_PIXEL` x the scene window of a tile; the default run's peak) and
the detection phase (processes x :data:`DETECTION_BYTES_PER_PIXEL` x the mosaic pixels of a
detection tile). The tail: :data:`TAIL_BYTES_PER_PROCESS` for the parent, the scoring beside
it and each selection process (the quick run's peak, four processes). Two local processes
share some pages the one-process fit counts twice (+5% on the default run). Expect it within
~10% for fields like these and treat it as a guide (~30%) for other tile sizes, source
densities and many processes.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

from .config import Scenario
from .errors import ConfigError, require

__all__ = ["Estimate", "estimate", "check_run", "check_writable_folder", "BASE_MEMORY_BYTES",
           "PARENT_BYTES_PER_MOSAIC_PIXEL", "TILE_BYTES_PER_SCENE_PIXEL", "TAIL_BYTES_PER_PROCESS",
           "DETECTION_BYTES_PER_PIXEL"]

GB = 1e9
#: Memory of the parent before any tile (interpreter, numpy/astropy/galsim/photutils, PSFs).
BASE_MEMORY_BYTES = 0.47e9
#: Memory the parent grows by per mosaic pixel of one band (sources, mapped file pages).
PARENT_BYTES_PER_MOSAIC_PIXEL = 16.0
#: Memory of one tile's rendering per scene pixel of its window (all bands in turn; the
#: field-dependent PSF's weighted images and the drift modes' scenes included).
TILE_BYTES_PER_SCENE_PIXEL = 118.0
#: Memory of each process of the run's tail: the parent, the scoring beside it and the
#: selection's sample processes (forked: each ~0.2-0.3 GB of private pages).
TAIL_BYTES_PER_PROCESS = 0.24e9
#: Memory of one detection tile per mosaic pixel (photutils segmentation and catalogue;
#: 1.2-1.6 GB for a 3584^2 tile in DEVELOPERS.md, 1.54 GB here).
DETECTION_BYTES_PER_PIXEL = 120.0
_FITS_BLOCK = 2880
_HEADER_BLOCKS = {"mosaic": 14, "truth_image": 9, "exposure": 9, "detections": 5,
                  "photometry": 8}
_TABLE_BYTES_PER_SOURCE = 150.0  # truth.fits, per expected candidate source
_DETECTION_BYTES_PER_SOURCE = 25.0  # detection catalogue, per expected candidate source
_PHOTOMETRY_BYTES_PER_SOURCE_BAND = 6.0  # photometry.fits: 5 columns of 4-8 bytes per band
# score/<band>/ (tables, plots, report page): grows with the mosaic's preview up to a cap
_SCORE_BYTES, _SCORE_BYTES_PER_PIXEL, _SCORE_PREVIEW_PIXELS = 0.90e6, 7.5, 2.8e5
_SCORE_BYTES_PER_SOURCE = 11.7
_SMALL_BYTES = 1.07e6  # psf.png (~1.0 MB), tables, logs, Hydra's files
_PHOTOZ_BYTES, _PHOTOZ_BYTES_PER_SOURCE = 0.046e6, 125.0  # photoz.fits (P(z) rows of detections)
# selection/<sample>/ (tables, plots, report page), per sample
_SELECTION_BYTES, _SELECTION_BYTES_PER_SOURCE = 0.341e6, 9.3
_SCORE_FILES = 20
_SELECTION_FILES = 11  # per sample (10 when it selects nothing: no P(z) figure)
_RUN_FILES = 11  # 8 run files + Hydra's 3 bookkeeping files
_PSF_HEADER_BLOCKS = 18  # psf_<band>.fits primary header (the scenario's HISTORY cards)
# a lensed run: convergence.fits (KAPPA, float32), lens.png (0.11-0.20 MB) and
# critical_curves.ecsv, whose curves grow with the map's side: 0.09, 0.25 and 0.75 MB for
# maps of 12", 20" and 57" (tiny test field, survey=quick, survey=deep; lens=cluster)
_LENS_FILES, _LENS_PNG_BYTES, _LENS_CURVE_BYTES_PER_ARCSEC, _LENS_HEADER_BLOCKS = 3, 0.15e6, \
    13e3, 6
_DETECTION_CORE, _DETECTION_MARGIN = 3072, 256  # simfield.detect.TILE_CORE_PIX, TILE_MARGIN_PIX
_TILE_MARGIN_ARCSEC = 4.0  # scene window beyond the tile: core PSF, lensing grid, padding


@dataclass(frozen=True)
class Estimate:
    """Predicted resources of one run (see the module docstring for the calibration)."""

    mosaic_pixels: int  #: per band
    detector_pixels: int  #: per exposure and band
    scene_window_pixels: int  #: largest tile's scene window
    n_tiles: int
    tile_processes: int
    detection_processes: int
    expected_sources: float  #: candidate galaxies + stars (before the exact magnitude cut)
    n_files: int
    disk_bytes: float
    memory_bytes: float

    def lines(self) -> list[str]:
        """Human-readable summary, one item per line."""
        return [
            f"mosaic: {self.mosaic_pixels:,} pixels per band; exposures: "
            f"{self.detector_pixels:,} detector pixels each",
            f"tiles: {self.n_tiles} (scene window up to {self.scene_window_pixels:,} pixels), "
            f"{self.tile_processes} tile and {self.detection_processes} detection processes",
            f"candidate sources: ~{self.expected_sources:,.0f} (drawn before the exact "
            "magnitude cut: the truth table keeps fewer, about a third in the default scenario)",
            f"files: {self.n_files}",
            f"disk: {self.disk_bytes / GB:.3g} GB",
            f"peak memory: {self.memory_bytes / GB:.3g} GB",
        ]


def _processes(workers: int, n: int) -> int:
    return max(1, min(n, os.cpu_count() or 1) if workers == 0 else min(workers, n))


_GALAXIES: dict[str, float] = {}  # expected galaxies by (population, bands, area)


def _expected_galaxies(sc: Scenario, area_arcsec2: float) -> float:
    """Candidate galaxies expected over ``area_arcsec2`` (remembered: ~0.2 s each)."""
    from .bands import make_bands
    from .population.lightcone import expected_galaxies

    key = repr((sc.population, sc.telescope.bands, area_arcsec2))
    if key not in _GALAXIES:
        if len(_GALAXIES) > 256:
            _GALAXIES.clear()
        _GALAXIES[key] = expected_galaxies(sc.population, make_bands(sc), area_arcsec2)
    return _GALAXIES[key]


def _population_area(sc: Scenario) -> float:
    from .pipeline import FIELD_MARGIN_ARCSEC

    s = sc.survey
    return (s.width_arcsec + 2 * FIELD_MARGIN_ARCSEC) * (s.height_arcsec + 2 * FIELD_MARGIN_ARCSEC)


def estimate(sc: Scenario, galaxies: float | None = None) -> Estimate:
    """Predict the pixels, files, disk bytes and peak memory of running ``sc``.

    Parameters
    ----------
    sc : Scenario
        A validated scenario.
    galaxies : float, optional
        Expected candidate galaxies, if already computed (else from the luminosity function).

    Returns
    -------
    Estimate
    """
    from .survey import mosaic_grid, scene_grid
    from .survey.grids import _detector_size  # noqa: PLC2701 (pure geometry, no randomness)

    tel, srv = sc.telescope, sc.survey
    nb, n_exp = len(tel.bands), srv.n_exposures
    n_det_bands = len(sc.detection_bands) if sc.detection.enabled else 0
    mg, sg = mosaic_grid(srv), scene_grid(srv, tel)
    nx, ny = _detector_size(srv, tel)
    npix, ndet = mg.nx * mg.ny, nx * ny
    if galaxies is None:
        galaxies = _expected_galaxies(sc, _population_area(sc))
    stars = srv.width_arcsec * srv.height_arcsec * sc.population.star_density_arcmin2 / 3600.0
    sources = galaxies + stars

    # tiles: ceil(n / tile_pixels) nearly equal parts per axis (simfield.survey.plan_tiles)
    tx, ty = math.ceil(mg.nx / srv.tile_pixels), math.ceil(mg.ny / srv.tile_pixels)
    side = max(mg.nx / tx, mg.ny / ty) * mg.scale + 2 * _TILE_MARGIN_ARCSEC  # arcsec
    window = min(sg.nx * sg.ny, math.ceil(side / sg.scale) ** 2)
    n_tiles = tx * ty
    tile_procs = _processes(sc.workers, n_tiles)
    dt = [math.ceil(n / _DETECTION_CORE) for n in (mg.nx, mg.ny)]
    det_tile = math.prod(min(n, math.ceil(n / k) + 2 * _DETECTION_MARGIN)
                         for n, k in zip((mg.nx, mg.ny), dt))
    det_procs = _processes(sc.workers, dt[0] * dt[1]) if n_det_bands else 0

    block = _FITS_BLOCK
    disk = nb * (16 * npix + _HEADER_BLOCKS["mosaic"] * block  # IMAGE INVVAR EXPOSURE FLAGS
                 + 10 * npix + _HEADER_BLOCKS["truth_image"] * block  # IMAGE SEGMAP ARTEFACT
                 + _psf_file_bytes(sc, sg.scale))
    n_files = _RUN_FILES + 3 * nb
    if srv.write_exposures:
        disk += nb * n_exp * (12 * ndet + _HEADER_BLOCKS["exposure"] * block)  # IMAGE VARIANCE FLAGS
        n_files += nb * n_exp
    disk += n_det_bands * (4 * npix + _HEADER_BLOCKS["detections"] * block
                           + _DETECTION_BYTES_PER_SOURCE * sources)
    n_files += n_det_bands
    if sc.photometry.enabled and n_det_bands:
        disk += (_HEADER_BLOCKS["photometry"] * block
                 + _PHOTOMETRY_BYTES_PER_SOURCE_BAND * nb * sources)
        n_files += 1
        if sc.photoz.enabled and nb >= 2:
            disk += _PHOTOZ_BYTES + _PHOTOZ_BYTES_PER_SOURCE * sources
            n_files += 1
        if sc.selection.enabled:
            n_samples = len(sc.selection.samples)
            disk += n_samples * (_SELECTION_BYTES + _SELECTION_BYTES_PER_SOURCE * sources)
            n_files += n_samples * _SELECTION_FILES
    if sc.score.enabled and n_det_bands:
        disk += n_det_bands * (_SCORE_BYTES + _SCORE_BYTES_PER_PIXEL
                               * min(npix, _SCORE_PREVIEW_PIXELS)
                               + _SCORE_BYTES_PER_SOURCE * sources)
        n_files += n_det_bands * _SCORE_FILES
    disk += _TABLE_BYTES_PER_SOURCE * sources + _SMALL_BYTES
    if sc.lens.kind != "none":
        disk += _lens_bytes(sc)
        n_files += _LENS_FILES

    tiles_mem = tile_procs * TILE_BYTES_PER_SCENE_PIXEL * window
    detect_mem = det_procs * DETECTION_BYTES_PER_PIXEL * det_tile
    memory = BASE_MEMORY_BYTES + PARENT_BYTES_PER_MOSAIC_PIXEL * npix + max(tiles_mem, detect_mem)
    # the tail: with several local processes the scoring runs beside photometry and the
    # selection's samples, which are scored in up to that many processes of their own
    local = _processes(sc.workers, 10 ** 9)
    n_tail = 1
    if n_det_bands and local > 1 and sc.cluster.kind == "none":
        n_tail += 1 if sc.score.enabled else 0
        if sc.photometry.enabled and sc.selection.enabled and sc.selection.samples:
            n_tail += min(local, len(sc.selection.samples))
    memory = max(memory, TAIL_BYTES_PER_PROCESS * n_tail)
    return Estimate(npix, ndet, window, n_tiles, tile_procs, det_procs, sources, n_files,
                    float(disk), float(memory))


def _hdu_bytes(data_bytes: int, header_blocks: int = 1) -> int:
    """Bytes of one FITS HDU: its header blocks and its data padded to whole blocks."""
    return (header_blocks + math.ceil(data_bytes / _FITS_BLOCK)) * _FITS_BLOCK


def _lens_bytes(sc: Scenario) -> float:
    """Bytes of a lensed run's own files: convergence.fits (float32 pixels of
    ``simfield._products.CONVERGENCE_PIXEL_ARCSEC`` over the field and its margin), the
    critical curves (by the map's mean side, arcsec) and lens.png."""
    from ._products import CONVERGENCE_PIXEL_ARCSEC
    from .pipeline import FIELD_MARGIN_ARCSEC

    s, step = sc.survey, CONVERGENCE_PIXEL_ARCSEC
    w, h = s.width_arcsec + 2 * FIELD_MARGIN_ARCSEC, s.height_arcsec + 2 * FIELD_MARGIN_ARCSEC
    kappa = 4 * math.ceil(w / step) * math.ceil(h / step) + _LENS_HEADER_BLOCKS * _FITS_BLOCK
    return kappa + _LENS_PNG_BYTES + _LENS_CURVE_BYTES_PER_ARCSEC * (w + h) / 2


def _psf_file_bytes(sc: Scenario, scale_arcsec: float) -> int:
    """Exact size of one ``psf_<band>.fits`` (bytes): primary header, ``PSF``, ``PSF_WIDE``,
    ``PSF_DET`` (float32 stamps), ``EE`` (two float64 columns per stamp radius); with the
    field-dependent PSF ``FIELD_MODES`` (mean + modes, float64) and ``FIELD_GRID`` (ten
    float64 columns per grid point, two header blocks); with drift ``PSF_MOSAIC`` and
    ``PSF_EXPOSURES`` (one float32 stamp per exposure)."""
    tel = sc.telescope
    core, wide = (2 * math.ceil(r / scale_arcsec) + 1
                  for r in (tel.psf.core_radius_arcsec, tel.psf.spike_radius_arcsec))
    stamp = 4 * core * core
    n = _PSF_HEADER_BLOCKS * _FITS_BLOCK + 2 * _hdu_bytes(stamp) + _hdu_bytes(4 * wide * wide) \
        + _hdu_bytes(16 * core)
    if tel.field_psf.enabled:
        n += _hdu_bytes(2 * stamp * (tel.field_psf.n_modes + 1)) \
            + _hdu_bytes(80 * tel.field_psf.grid ** 2, 2)
    if tel.drift.enabled:
        n += _hdu_bytes(stamp) + _hdu_bytes(stamp * sc.survey.n_exposures)
    return n


def _check_match_to(sc: Scenario) -> None:
    """Refuse a ``photometry.match_to`` band whose PSF is narrower than another band's, which
    the photometry would refuse after the mosaics are made (matching to it would deconvolve):
    the bands' effective PSFs at the field centre (the run's ``PSF_DET``), read from the PSF
    cache or made without writing it (~1 s a band)."""
    ph = sc.photometry
    if not (ph.match_to and ph.enabled and sc.detection.enabled):
        return
    from .bands import make_bands
    from .optics.psf import cached_band_psf, effective_psf
    from .photometry import check_match_target
    from .survey import scene_grid

    tel = sc.telescope
    scale = scene_grid(sc.survey, tel).scale
    fwhm = {b.name: effective_psf(cached_band_psf(tel, b, scale, tel.psf.core_radius_arcsec,
                                                  sc.seed, tel.psf.cache_dir,
                                                  pixel_integrated=False, store=False),
                                  tel.pixel_scale_arcsec).fwhm_arcsec
            for b in make_bands(sc)}
    check_match_target(fwhm, ph.match_to)  # the photometry's own rule


def check_writable_folder(key: str, path: str | os.PathLike) -> None:
    """Refuse ``path`` unless it is, or can be created as, a writable folder (creates nothing).

    The nearest existing ancestor must be a writable, searchable directory on a file system
    that holds files (pseudo file systems such as /proc report no blocks).
    """
    p = Path(path).expanduser().absolute()
    if p.exists():
        require(p.is_dir(), key, str(path), "must be a folder (it is a file)")
    anc = p
    while not anc.exists():
        anc = anc.parent
    require(anc.is_dir(), key, str(path), f"cannot be created: {anc} is not a folder")
    st = os.statvfs(anc)
    writable = os.access(anc, os.W_OK | os.X_OK) and st.f_blocks > 0 \
        and not st.f_flag & os.ST_RDONLY
    require(writable, key, str(path), f"must be a writable folder ({anc} is not writable)")


def check_run(sc: Scenario) -> Estimate:
    """Refuse, before any work, a run that would fail later or exceed ``sc.limits``.

    Checks the expected source count against ``population.max_sources``, that the PSF cache
    folder can be written, and the estimated disk and memory against ``limits.disk_gb`` and
    ``limits.memory_gb``. Raises :class:`~simfield.errors.ConfigError` naming the key.

    Returns
    -------
    Estimate
    """
    pop = sc.population
    galaxies = _expected_galaxies(sc, _population_area(sc))
    if galaxies > pop.max_sources:
        raise ConfigError("population.max_sources", pop.max_sources,
                          f"is too small: {galaxies:.0f} sources expected over the field; "
                          "raise it, or shrink survey.width_arcsec / survey.height_arcsec, "
                          "or lower population.mag_limit")
    check_writable_folder("telescope.psf.cache_dir", sc.telescope.psf.cache_dir)
    _check_match_to(sc)
    est = estimate(sc, galaxies)
    lim = sc.limits
    if est.disk_bytes > lim.disk_gb * GB:
        raise ConfigError("limits.disk_gb", lim.disk_gb,
                          f"is exceeded: the run would write ~{est.disk_bytes / GB:.3g} GB; "
                          f"raise limits.disk_gb (e.g. limits.disk_gb="
                          f"{math.ceil(est.disk_bytes / GB * 1.2)}) or make the run smaller")
    if est.memory_bytes > lim.memory_gb * GB:
        raise ConfigError("limits.memory_gb", lim.memory_gb,
                          f"is exceeded: the run would need ~{est.memory_bytes / GB:.3g} GB; "
                          f"raise limits.memory_gb (e.g. limits.memory_gb="
                          f"{math.ceil(est.memory_bytes / GB * 1.2)}), or lower workers or "
                          "survey.tile_pixels")
    return est
