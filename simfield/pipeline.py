"""Run one scenario: the only module that knows the order of the stages.

``run_scenario(scenario, out_dir)`` goes from a validated :class:`~simfield.config.Scenario` to
a run directory holding mosaics, truth images, PSFs, truth tables, detections and scores. Each
stage gets typed inputs and its own named random stream (:func:`simfield.random.stream`), so
the same scenario and seed give identical files and changing one stage's settings does not
reshuffle the others' randomness. Outputs are written atomically; :data:`COMPLETE_MARKER` is
written last.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import sys
import time
import weakref
from concurrent.futures import ProcessPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy.table import Table

from . import __version__
from ._procs import die_with_parent
from .bands import Band, ab_to_njy, make_bands, njy_to_ab
from .columns import POINT_KINDS, SOURCE_KINDS
from .config import Scenario, hash_and_yaml
from .grid import Grid
from ._products import (SEGMENTATION_NSIGMA, artefact_map, covariances_kept, image_files,
                        noise_correlations, noise_covariances, write_lens_maps, write_psf,
                        write_truth)
from .io import COMPLETE_MARKER, Provenance, write_json, write_table, write_text
from .fieldconv import add_bright_field, field_axes
from .random import stream
from .scene import (Stamp, accumulate, add_bright, convolve_tiled, convolve_weighted,
                    dominant_source,
                    STAMP_HALF_MAX, draw_source_stamp, draw_window, point_stamp,
                    stamp_half_size)

__all__ = ["RunResult", "run_scenario", "make_bands", "SEGMENTATION_NSIGMA"]

log = logging.getLogger("simfield")

#: Sources are generated over the field plus this margin on each side (arcsec), so light from
#: just outside the field, and lensed images of sources behind its edge, are present.
FIELD_MARGIN_ARCSEC = 2.0


@dataclass
class RunResult:
    """What a run produced: its directory, the files, headline numbers and stage timings (s)."""

    out_dir: Path
    files: list[Path] = field(default_factory=list)
    summary: dict = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)


class _Timer:
    def __init__(self, timings: dict[str, float], progress: bool):
        self.timings = timings
        self.progress = progress

    @contextmanager
    def __call__(self, name: str):
        t0 = time.perf_counter()
        if self.progress:
            log.info("%s ...", name)
        yield
        dt = time.perf_counter() - t0
        self.timings[name] = self.timings.get(name, 0.0) + dt
        if self.progress:
            log.info("%s done in %.2f s", name, dt)


def skipped_stages(sc: Scenario) -> dict[str, str]:
    """The stages ``sc`` enables that will not run, each with why: what it reads is switched
    off (detection, photometry) or it needs two bands or more (photo-z). Empty when every
    enabled stage runs. Recorded in ``summary.json`` (``skipped``) and told at the start."""
    why = {}
    if not sc.detection.enabled:
        for name in ("photometry", "photoz", "selection", "score"):
            if getattr(sc, name).enabled:
                why[name] = "needs detections (detection.enabled=false)"
        return why
    if not sc.photometry.enabled:
        for name in ("photoz", "selection"):
            if getattr(sc, name).enabled:
                why[name] = "needs photometry (photometry.enabled=false)"
    elif sc.photoz.enabled and len(sc.band_names) < 2:
        why["photoz"] = f"needs two bands or more (bands: {', '.join(sc.band_names)})"
    return why


def _bands_table(bands: list[Band], area: float) -> Table:
    t = Table()
    t["name"] = [b.name for b in bands]
    t["pivot_nm"] = [b.pivot_nm for b in bands]
    t["width_nm"] = [b.width_nm for b in bands]
    t["zeropoint"] = [b.zeropoint(area) for b in bands]
    t["sky_mjy_sr"] = [b.sky_mjy_sr for b in bands]
    t["pivot_nm"].unit = "nm"
    t["width_nm"].unit = "nm"
    t["zeropoint"].unit = "mag"
    t["sky_mjy_sr"].unit = "MJy/sr"
    t.meta["description"] = ("Bands of the scenario. zeropoint: AB magnitude giving 1 e-/s "
                             "(m = zeropoint - 2.5 log10(rate / (e-/s))).")
    return t


def run_scenario(sc: Scenario, out_dir: str | Path, progress: bool = False) -> RunResult:
    """Make the mock field of ``sc`` in ``out_dir``; see the README for the files written.

    Parameters
    ----------
    sc : Scenario
        A validated scenario (:func:`simfield.config.to_scenario`).
    out_dir : path
        Run directory (created if needed).
    progress : bool
        Log stage progress.

    With ``cluster`` other than ``none`` the tiles run on Dask (:mod:`simfield.engine`), which
    is reached before anything is written.
    """
    from .engine import open_engine

    with open_engine(sc.cluster, progress) as engine:
        return _run_scenario(sc, out_dir, progress, engine)


def _run_scenario(sc: Scenario, out_dir: str | Path, progress: bool, engine) -> RunResult:
    # stage modules are imported here so that ``import simfield.pipeline`` stays light
    from .optics.drift import drift_hdus, drift_psf_model
    from .optics.field import field_hdus, field_panels, field_psf_model, shape_cards
    from .optics.psf import cached_band_psf, cached_psf_png, effective_psf
    from .population.components import source_bulge_fractions
    from .population.lightcone import make_population
    from .survey import exposure_grids, mosaic_grid, scene_grid

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    marker = out / COMPLETE_MARKER
    if marker.exists():
        marker.unlink()
    res = RunResult(out_dir=out)
    timer = _Timer(res.timings, progress)
    skipped = skipped_stages(sc)
    for name, why in skipped.items() if progress else ():
        log.info("%s will not run: %s", name, why)
    prov = Provenance(sc.seed, *hash_and_yaml(sc))
    tel, srv = sc.telescope, sc.survey
    area = tel.collecting_area_m2
    bands = make_bands(sc)
    files = res.files

    with timer("setup"):
        sgrid: Grid = scene_grid(srv, tel)
        mgrid: Grid = mosaic_grid(srv)
        egrids = exposure_grids(srv, tel, stream(sc.seed, "dither"))
        files.append(write_table(out / "bands.ecsv", _bands_table(bands, area), prov))
        files.append(write_text(out / "scenario.yaml", prov.config_yaml))  # = to_yaml(sc)
    # the mosaic noise covariances depend on the geometry alone: with several local workers
    # they are drizzled in a process of their own while the population and PSFs are made
    local = sc.workers or os.cpu_count() or 1  # processes (0: one per core)
    covariances = None if covariances_kept(sc, egrids, mgrid) else \
        _Beside(noise_covariances, (sc, egrids, mgrid), engine is None and local > 1)

    # ---------------------------------------------------------------- population (+ lens)
    with timer("population"):
        hx = srv.width_arcsec / 2 + FIELD_MARGIN_ARCSEC
        hy = srv.height_arcsec / 2 + FIELD_MARGIN_ARCSEC
        sources = make_population(sc.population, bands, (-hx, hx), (-hy, hy),
                                  stream(sc.seed, "population"))
        lens = None
        if sc.lens.kind != "none":
            from .lensing import build_lens
            from .population.members import make_members

            members = make_members(sc.lens, bands, stream(sc.seed, "members"), (-hx, hx),
                                   (-hy, hy))
            lens = build_lens(sc.lens, members)
            if sc.lens.icl_fraction > 0 and len(members):
                members = _stack_sources(members, _icl_source(sc.lens, members, bands))
            sources = _stack_sources(sources, members)
        sources["id"] = np.arange(1, len(sources) + 1)
        if sc.population.figure:
            from .population.figure import write_population_figure

            files.append(write_population_figure(out / "population.png", sources, bands,
                                                 4 * hx * hy, sc.seed))

    with timer("lensing"):
        images, mag_total, n_images = _truth_images(sources, lens, sc, hx, hy)
        sources["magnification"] = mag_total
        sources["n_images"] = n_images
        if lens is not None:
            files.extend(write_lens_maps(out, lens, sc, mgrid, hx, hy, prov))

    # ---------------------------------------------------------------- optics
    with timer("optics"):
        scale = sgrid.scale
        cache = Path(tel.psf.cache_dir)
        psf_core, psf_wide, fields, drifts = {}, {}, {}, {}
        # sampled, not pixel-integrated: the stamps already carry the scene-pixel box
        for b in bands:
            psf_core[b.name] = cached_band_psf(tel, b, scale, tel.psf.core_radius_arcsec,
                                               sc.seed, cache, pixel_integrated=False)
            psf_wide[b.name] = cached_band_psf(tel, b, scale, tel.psf.spike_radius_arcsec,
                                               sc.seed, cache, pixel_integrated=False)
            if tel.drift.enabled:
                drifts[b.name] = drift_psf_model(tel, b, scale, tel.psf.core_radius_arcsec,
                                                 sc.seed, srv.n_exposures,
                                                 psf_core[b.name].image, cache)
            if tel.field_psf.enabled:
                fields[b.name] = field_psf_model(tel, b, scale, tel.psf.core_radius_arcsec,
                                                sc.seed, srv.width_arcsec / 2,
                                                srv.height_arcsec / 2, cache)
        for b in bands:
            fm = fields.get(b.name)
            files.append(write_psf(out / f"psf_{b.name}.fits", psf_core[b.name],
                                    psf_wide[b.name],
                                    effective_psf(psf_core[b.name], tel.pixel_scale_arcsec),
                                    b, prov, shape_cards(fm, psf_core[b.name].image, scale),
                                    (field_hdus(fm, mgrid) if fm is not None else [])
                                    + drift_hdus(drifts.get(b.name), psf_core[b.name])))
        files.append(cached_psf_png(tel, [psf_wide[b.name] for b in bands], sc.seed,
                                    out / "psf.png", cache, roll_deg=sc.survey.roll_deg,
                                    field=field_panels(fields, bands, srv.width_arcsec / 2,
                                                      srv.height_arcsec / 2)))

    # ---------------------------------------------------------------- tiles
    from .survey import plan_tiles

    tiles = plan_tiles(mgrid, egrids, sgrid, srv.tile_pixels)
    with timer("noise_correlation"):  # what is left of it here
        noise = noise_correlations(sc, bands, egrids, mgrid,
                                   None if covariances is None else covariances.result())
    rates, bright = {}, {}
    mu = np.maximum(np.asarray(sources["magnification"], float), 1e-6)
    for b in bands:
        mag = np.asarray(sources[f"mag_{b.name}"], float)
        rates[b.name] = np.nan_to_num(ab_to_njy(mag) * b.rate_per_njy(area), nan=0.0)
        bright[b.name] = (mag - 2.5 * np.log10(mu)) < tel.psf.bright_mag
    ctx = _TileContext(sc=sc, bands=bands, sources=sources, lens=lens, sgrid=sgrid,
                       mgrid=mgrid, egrids=egrids, tiles=tiles, psf_core=psf_core,
                       psf_wide=psf_wide, rates=rates, bright=bright, files={},
                       field_psfs=fields, drift=drifts,
                       bulge=source_bulge_fractions(sources, [b.name for b in bands]))
    if sc.detector.persistence:
        from ._readout_hooks import persistence_stimuli

        ctx.stimuli = persistence_stimuli(sc, bands, sources, egrids, psf_core, rates)
    from .resume import remove_resume, resumable_section_files, resume_folder, resume_key

    # what the run finishes is kept in its .resume folder until it is complete, so a relaunch
    # renders only the tiles not done (and detects only the detection tiles not done)
    key = resume_key(prov.config_hash, __version__)
    with timer("tiles"), resumable_section_files(
            out, image_files(out, sc, bands, mgrid, egrids, noise), prov,
            key) as (sfiles, ctx.ledger):
        ctx.files = {f.final.name: f for f in sfiles}
        for b in bands:
            ctx.files[f"mosaic_{b.name}.fits"].array("NOISECOR")[:] = noise[b.name].rho
        results = _map_tiles(ctx, sc.workers, progress, engine)
        with timer("depth"):
            depths = {b.name: _band_depth(sc, b, psf_core[b.name], ctx.files, mgrid,
                                          noise[b.name])
                      for b in bands}
    files.extend(f.final for f in sfiles)
    del ctx
    for r in results:
        for k, v in r["timings"].items():
            res.timings[k] = res.timings.get(k, 0.0) + v
    res.timings["tiles_cpu"] = sum(sum(r["timings"].values()) for r in results)

    # ---------------------------------------------------------------- truth tables
    with timer("truth"):
        for b in bands:
            images[f"mag_{b.name}"] = _image_mags(images, sources, b.name)
        files.append(write_truth(out / "truth.fits", sources, images, mgrid, prov))

    summary = {
        "simfield_version": __version__,
        "seed": sc.seed,
        "n_sources": int(len(sources)),
        "n_galaxies": int(np.sum(sources["kind"] == "galaxy")),
        "n_stars": int(np.sum(sources["kind"] == "star")),
        "n_per_kind": {k: int(np.sum(sources["kind"] == k)) for k in SOURCE_KINDS},
        "n_images": int(len(images)),
        "n_multiply_imaged": int(np.sum(np.asarray(sources["n_images"]) > 1)),
        "field_arcmin2": srv.width_arcsec * srv.height_arcsec / 3600.0,
        "depth_ab": depths,
        "skipped": skipped,
    }
    # provisional: the score and selection reports read the depths from it; rewritten whole
    # at the end (COMPLETE, not this file, says a run finished)
    write_json(out / "summary.json", summary, prov)

    # ---------------------------------------------------------------- detect and score
    if sc.detection.enabled:
        with timer("detect"):
            from .detect import run_detection

            summary["detections"] = run_detection(out, sc, bands, prov, progress, sc.workers,
                                                  engine, resume_folder(out, key))
            files.extend(out / f"detections_{b}.fits" for b in summary["detections"])
    # scoring reads only the images, the truth and the detections: with several local
    # workers it runs in a process of its own beside photometry, photo-z and selection, on
    # a Dask cluster as one of its tasks
    scoring = None
    if sc.score.enabled and sc.detection.enabled:
        if progress:
            log.info("score ...")
        scoring = _Beside(_score_task, (out, sc, prov), engine is None and local > 1, engine)
    try:
        _measure_and_select(out, sc, bands, prov, summary, files, timer,
                            local if engine is None else 1)
        if scoring is not None:
            summary["score"], res.timings["score"] = scoring.result()
            if progress:
                log.info("score done in %.2f s", res.timings["score"])
            files.extend(out / "score" / b / "summary.json" for b in summary["score"])
    finally:
        if scoring is not None:
            scoring.close()

    summary["timings_s"] = dict(res.timings)

    files.append(write_json(out / "summary.json", summary, prov))
    res.summary = summary
    listed = sorted({str(Path(f).relative_to(out)) for f in files if Path(f).is_relative_to(out)})
    write_text(marker, f"simfield {__version__} seed {sc.seed} config {prov.config_hash}\n"
               + "".join(f"{f}\n" for f in listed))
    remove_resume(out)
    return res


def _measure_and_select(out: Path, sc: Scenario, bands: list, prov, summary: dict, files: list,
                        timer, workers: int = 1) -> None:
    """Photometry, photo-z and selection of a run's detections, in that order (each reads
    the one before); their summaries go into ``summary`` and their files into ``files``.
    The selection's samples are scored in ``workers`` local processes."""
    if sc.photometry.enabled and sc.detection.enabled:
        with timer("photometry"):
            from .photometry import measure_run

            summary["photometry"] = measure_run(out, sc, prov)
            files.append(out / "photometry.fits")
    # photometric redshifts need colours: at least two bands
    if sc.photoz.enabled and len(bands) >= 2 and (out / "photometry.fits").exists():
        with timer("photoz"):
            from .photoz import fit_run

            summary["photoz"] = fit_run(out, sc, prov)
            files.append(out / "photoz.fits")
    if sc.selection.enabled and (out / "photometry.fits").exists():
        with timer("selection"):
            from .selection import score_run_selection

            summary["selection"] = score_run_selection(out, sc, prov, workers)
            files.extend(out / "selection" / s / "summary.json" for s in summary["selection"])


def _score_task(out: Path, sc: Scenario, prov) -> tuple[dict, float]:
    from .score.run import score_pipeline_run

    t0 = time.perf_counter()
    return score_pipeline_run(out, sc, prov), time.perf_counter() - t0


class _Beside:
    """``fn(*args)`` started now: as a task of ``engine`` (a Dask engine whose workers are
    processes of their own), else in a forked process of its own (which dies with this one)
    if ``apart``, else here and at once. :meth:`result` gives what it returned. Used for the
    run's scoring (:func:`_score_task`) beside photometry and selection, and for the mosaic
    noise covariances beside the population and PSFs."""

    def __init__(self, fn, args: tuple, apart: bool, engine=None):
        self._pool = self._future = self._done = self._task = None
        self._engine, self._desc = engine, fn.__name__.strip("_").replace("_", " ")
        if engine is not None and engine.separate_processes:
            self._task = engine.submit(fn, *args)
        elif apart:
            self._pool = ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("fork"),
                                             initializer=die_with_parent,
                                             initargs=(os.getpid(),))
            self._future = self._pool.submit(fn, *args)
            # a run that stops before asking for the result leaves no process behind
            weakref.finalize(self, self._pool.shutdown, wait=False, cancel_futures=True)
        else:
            self._done = fn(*args)

    def result(self):
        if self._task is not None:
            return self._engine.wait(self._task, self._desc)
        if self._future is None:
            return self._done
        try:
            return self._future.result()
        finally:
            self.close()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)


# ---------------------------------------------------------------------------- tiles
@dataclass
class _TileContext:
    """Everything a tile's rendering needs; shared with worker processes by fork."""

    sc: Scenario
    bands: list
    sources: Table
    lens: object
    sgrid: Grid
    mgrid: Grid
    egrids: list
    tiles: list
    psf_core: dict
    psf_wide: dict
    rates: dict  #: band -> e-/s per source row
    bright: dict  #: band -> bool per source row, drawn with the large PSF
    files: dict  #: file name -> simfield.io.SectionFile being written
    bulge: dict  #: band -> B/T per source row (two-component galaxies), or None
    stimuli: list = field(default_factory=list)  #: persistence stimuli (simfield.readout)
    field_psfs: dict = None  #: band -> optics.field.FieldPSF (field-dependent PSF), if enabled
    drift: dict = None  #: band -> optics.drift.DriftPSF (exposure-to-exposure PSF), if enabled
    ledger: object = None  #: simfield.resume.TileLedger: tiles done (recorded by each tile)


_CTX: _TileContext | None = None  # set in the parent before forking tile workers


def _tile_task(ctx: _TileContext, i: int) -> dict:
    """Render tile ``i``, then record it as done in ``ctx.ledger`` (after its sections are
    flushed to disk), where it ran: a local process or a Dask worker."""
    out = _render_tile(ctx, i)
    if ctx.ledger is not None:
        ctx.ledger.record(i, out)
    return out


def _tile_worker(i: int):
    return _tile_task(_CTX, i)


def _map_tiles(ctx: _TileContext, workers: int, progress: bool = False,
               engine=None) -> list[dict]:
    """Render every tile, in ``workers`` processes (0: one per core, at most one per tile),
    or as tasks of a Dask ``engine`` (:class:`simfield.engine.DaskEngine`).

    Tiles draw only from their own named random streams and write disjoint sections of the
    output files, so the files do not depend on the number of workers. Tiles that
    ``ctx.ledger`` (:class:`simfield.resume.TileLedger`) records as done by an earlier launch
    are skipped (their results are read back from it).
    """
    from tqdm import tqdm

    n_tiles, ledger = len(ctx.tiles), ctx.ledger
    todo = [i for i in range(n_tiles) if ledger is None or not ledger.done(i)]
    if len(todo) < n_tiles:
        msg = f"simfield: resuming, {n_tiles - len(todo)} of {n_tiles} tiles already done"
        log.info(msg)
        if progress:
            print(msg, file=sys.stderr)
    if engine is not None:
        sync = [] if ledger is not None else [str(f.path) for f in ctx.files.values()]
        new = engine.map(_tile_task, ctx, todo, sync, "tiles", progress)
    else:
        n = min(len(todo), os.cpu_count() or 1) if workers == 0 else min(workers, len(todo))
        bar = dict(total=len(todo), desc="tiles", unit="tile", disable=not progress,
                   leave=False)
        if n <= 1:
            new = [_tile_task(ctx, i) for i in tqdm(todo, **bar)]
        else:
            global _CTX
            _CTX = ctx
            try:
                with ProcessPoolExecutor(n, mp_context=multiprocessing.get_context("fork"),
                                         initializer=die_with_parent,
                                         initargs=(os.getpid(),)) as pool:
                    new = list(tqdm(pool.map(_tile_worker, todo), **bar))
            finally:
                _CTX = None
    got = dict(zip(todo, new))
    return [got[i] if i in got else ledger.result(i) for i in range(n_tiles)]


def _grow(box, pad: int, shape) -> tuple[int, int, int, int]:
    """``box`` (y0, y1, x0, x1) grown by ``pad`` on every side, cut to ``shape`` (None: not
    cut, so it may reach beyond the grid)."""
    y0, y1, x0, x1 = box
    if shape is None:
        return (y0 - pad, y1 + pad, x0 - pad, x1 + pad)
    return (max(0, y0 - pad), min(shape[0], y1 + pad), max(0, x0 - pad), min(shape[1], x1 + pad))


def _render_tile(ctx: _TileContext, i: int) -> dict:
    """Stamps of the sources that reach tile ``i`` (drawn once), then per band its scene
    window, truth image, exposure windows and drizzled mosaic section, written into the run's
    files. Returns the stage timings (s)."""
    from ._readout_hooks import correlated_readout, nonlinearity, persistence
    from .detector import PixelNoise, expose, fixed_pattern_window
    from .survey import MOSAIC_SATURATED, drizzle_mosaic, sample_scene

    sc, tile, sgrid, mgrid = ctx.sc, ctx.tiles[i], ctx.sgrid, ctx.mgrid
    tel, srv = sc.telescope, sc.survey
    area = tel.collecting_area_m2
    ty, tx = tile.index
    timings: dict[str, float] = {}
    timer = _Timer(timings, False)
    hk = max(p.image.shape[0] // 2 for p in ctx.psf_core.values())
    hw = max(p.image.shape[0] // 2 for p in ctx.psf_wide.values())
    acc_box = _grow(tile.scene, hk, sgrid.shape)
    # start on a multiple of 4 scene pixels, like the scene windows, so the lensing node grid
    # of every tile's window is the same lattice (lensed stamps then agree across seams)
    acc_box = (acc_box[0] // 4 * 4, acc_box[1], acc_box[2] // 4 * 4, acc_box[3])
    acc_grid = sgrid.window(acc_box[2], acc_box[0], acc_box[3] - acc_box[2],
                            acc_box[1] - acc_box[0])
    bright_any = np.logical_or.reduce([ctx.bright[b.name] for b in ctx.bands])
    with timer("stamps"):
        stamps = _draw_tile(ctx, acc_box, acc_grid, _grow(tile.scene, hw, sgrid.shape),
                            bright_any, _grow(tile.scene, hw, None))
    ids = np.asarray(ctx.sources["id"])
    made: dict = {}  # the dithered windows share most of their detector blocks
    fixed = [fixed_pattern_window(sc.detector, sc.seed, *w, blocks=made)
             for w in tile.exposures]
    del made
    sy0, sy1, sx0, sx1 = tile.scene
    my0, my1, mx0, mx1 = tile.mosaic
    msec = (slice(my0, my1), slice(mx0, mx1))
    t_total = srv.exposure_time_s * srv.n_exposures
    grow = int(np.ceil(2 * tel.pixel_scale_arcsec / mgrid.scale)) + 1
    dbox = _grow(tile.mosaic, grow, mgrid.shape)
    dgrid = mgrid.window(dbox[2], dbox[0], dbox[3] - dbox[2], dbox[1] - dbox[0])
    dcut = (slice(my0 - dbox[0], my1 - dbox[0]), slice(mx0 - dbox[2], mx1 - dbox[2]))
    seg_at = None
    for b in ctx.bands:
        rate, brt = ctx.rates[b.name], ctx.bright[b.name]
        with timer("scene"):
            core = ctx.psf_core[b.name].image
            bt = ctx.bulge[b.name]
            acc = accumulate(stamps, rate, (acc_box[1] - acc_box[0], acc_box[3] - acc_box[2]),
                             select=~brt, origin=(acc_box[0], acc_box[2]), bulge_fraction=bt)
            fm = (ctx.field_psfs or {}).get(b.name)
            # wavefront drift: the light convolved with each eigen-PSF of the exposures'
            # changes, from the same forward transforms as the scene's own convolution
            dr = (ctx.drift or {}).get(b.name)
            dmodes = [] if dr is None else list(dr.modes.astype(np.float32))
            mean, modes, weights = core, (), ()
            if fm is not None:  # each source pixel spread by the PSF of its field position
                u, v = field_axes(sgrid, acc_box)
                mean, modes, weights = fm.mean, fm.modes, fm.weight_maps(u, v)
            # one FFT thread: the tile processes already use every core, and pocketfft's
            # threads cost more than they give on these ~800^2 transforms (0.40 s against
            # 0.48 s for a default band window, idle or beside a second process)
            if dmodes and all(m.shape == mean.shape for m in dmodes):
                conv, dconv = convolve_weighted(acc, mean, modes, weights, workers=1,
                                                also=dmodes)
            else:
                conv = convolve_weighted(acc, mean, modes, weights, workers=1)
                dconv = [convolve_tiled(acc, m, workers=1) for m in dmodes]
            dscene = np.stack([d[sy0 - acc_box[0]:sy1 - acc_box[0],
                                 sx0 - acc_box[2]:sx1 - acc_box[2]] for d in dconv]) \
                if dconv else None
            del acc, dconv
            scene = np.ascontiguousarray(conv[sy0 - acc_box[0]:sy1 - acc_box[0],
                                              sx0 - acc_box[2]:sx1 - acc_box[2]])
            del conv
            if fm is None:
                add_bright(scene, stamps, rate, brt, ctx.psf_wide[b.name].image,
                           origin=(sy0, sx0), bulge_fraction=bt)
            else:
                add_bright_field(scene, stamps, rate, brt, ctx.psf_wide[b.name].image, core,
                                 fm.at, sgrid, (sy0, sx0), bt)
            np.maximum(scene, 0.0, out=scene)  # FFT round-off leaves ~1e-7 negatives
        with timer("truth_image"):
            sky_mosaic = b.sky_rate(area, mgrid.scale)
            sigma_pix = np.sqrt(sky_mosaic * t_total) / t_total  # e-/s per mosaic pixel
            thr_scene = SEGMENTATION_NSIGMA * sigma_pix * (sgrid.scale / mgrid.scale) ** 2
            small = _crop_center(core, 0.4 / sgrid.scale)
            seg_scene = dominant_source(stamps, rate, ids, scene.shape, small / small.sum(),
                                        thr_scene, origin=(sy0, sx0), bulge_fraction=bt)
            if seg_at is None:  # the same lookup for every band
                seg_at = _nearest_pixels(tile.sgrid, tile.mgrid)
            seg = seg_scene[seg_at]
            del seg_scene
            f = ctx.files[f"truth_image_{b.name}.fits"]
            f.array("IMAGE")[msec] = sample_scene(scene, tile.sgrid, tile.mgrid)
            f.array("SEGMAP")[msec] = seg
        sky = b.sky_rate(area, tel.pixel_scale_arcsec)

        def exposures():
            """Each exposure window in turn, so only one is in memory while drizzling."""
            for k, eg in enumerate(tile.egrids):
                with timer("exposures"):
                    # this exposure's PSF: static + sum_k c_ek mode_k, formed while sampling
                    r = sample_scene(scene, tile.sgrid, eg, dscene,
                                     None if dscene is None else dr.coeffs[k])
                    # noise tied to detector pixels: pixels shared with a neighbouring tile
                    # get the same noise there, so the mosaic has no seams
                    ey0, _, ex0, _ = tile.exposures[k]
                    noise = PixelNoise(sc.seed, ("exposure", b.name, k), ey0, ex0, eg.shape)
                    e = expose(r, sky, None, sc.detector, srv.exposure_time_s,
                               tel.pixel_size_um, noise, fixed[k])
                    del r
                    if sc.detector.nonlinearity:
                        e = nonlinearity(sc, e, tile.exposures[k])
                    if sc.detector.correlated_noise:
                        e = correlated_readout(sc, b.name, k, ctx.egrids[k].shape, e,
                                               tile.exposures[k])
                    if sc.detector.persistence:
                        e = persistence(sc, ctx.stimuli, ctx.bands, b, k, e,
                                        tile.exposures[k])
                    if srv.write_exposures:
                        _write_exposure_section(ctx.files[f"exp_{b.name}_{k:02d}.fits"],
                                                e, tile, k, mgrid)
                yield e

        t0 = time.perf_counter()
        t_exp = timings.get("exposures", 0.0)
        # drizzle onto the tile grown by a few pixels, then cut: drizzle leaves out drops of
        # input pixels whose centres map outside its output, which would thin the tile's rim
        grown = drizzle_mosaic(exposures(), tile.egrids, dgrid, srv.drizzle_kernel, srv.pixfrac)
        # the artefact map is dilated on the grown tile, so it does not depend on the tiling
        artefacts = artefact_map(grown, MOSAIC_SATURATED)[dcut]
        mosaic = _crop_mosaic(grown, dcut)
        del grown
        timings["mosaic"] = timings.get("mosaic", 0.0) + (
            time.perf_counter() - t0 - (timings.get("exposures", 0.0) - t_exp))
        scene = None  # the closure above holds it until here
        with timer("mosaic"):
            f = ctx.files[f"mosaic_{b.name}.fits"]
            for name, ext in (("sci", "IMAGE"), ("wht", "INVVAR"), ("exp", "EXPOSURE"),
                              ("dq", "FLAGS")):
                f.array(ext)[msec] = getattr(mosaic, name)
            ctx.files[f"truth_image_{b.name}.fits"].array("ARTEFACT")[msec] = artefacts
        del mosaic, seg
    if ctx.lens is not None:
        from .lensing import forget_grid

        forget_grid(ctx.lens, acc_grid)
    return {"timings": timings}


def _crop_mosaic(m, cut):
    from .survey import Mosaic

    art = None if m.artefact is None else np.ascontiguousarray(m.artefact[cut])
    stripes = None if m.stripes is None else np.ascontiguousarray(m.stripes[cut])
    pers = None if m.persistence is None else np.ascontiguousarray(m.persistence[cut])
    return Mosaic(*(np.ascontiguousarray(getattr(m, k)[cut]) for k in ("sci", "wht", "exp", "dq")),
                  artefact=art, stripes=stripes, persistence=pers)


#: Empty-sky apertures drawn over the whole mosaic for the measured depth and noise check.
N_EMPTY_APERTURES = 2000


def _band_depth(sc: Scenario, b: Band, psf_core, files: dict, mgrid: Grid, noise) -> dict:
    """Predicted and measured 5-sigma depths (AB) and the aperture-noise check of one band.

    The empty-sky apertures are placed over the whole written mosaic at once (memory maps of
    its files), so nothing here depends on the tiling. ``aperture_noise`` compares, at the
    depth's radius and at the noise table's radii 2 and 10 pixels, the scatter of aperture
    sums of mosaic minus truth image with the files' statement F(r) sqrt(sum 1/INVVAR);
    ``noise`` is the band's :class:`~simfield.survey.NoiseCorrelation`, read as its header
    cards state it.
    """
    from .noisecards import noise_cards, noise_factor, read_noise_factors
    from .optics.psf import effective_psf
    from .survey import (MIN_EMPTY_APERTURES, depth_from_sums, empty_apertures, predicted_depth,
                         robust_sigma)

    tel, srv = sc.telescope, sc.survey
    zp = b.zeropoint(tel.collecting_area_m2)
    r_ap = sc.detection.aperture_radius_arcsec
    eff = effective_psf(psf_core, tel.pixel_scale_arcsec)
    ee = float(np.interp(r_ap, eff.ee_radii_arcsec, eff.ee_values))
    sky = b.sky_rate(tel.collecting_area_m2, tel.pixel_scale_arcsec)
    mf, tf = files[f"mosaic_{b.name}.fits"], files[f"truth_image_{b.name}.fits"]
    sci, wht = mf.array("IMAGE", "r"), mf.array("INVVAR", "r")
    truth, segm = tf.array("IMAGE", "r"), tf.array("SEGMAP", "r")
    with np.errstate(divide="ignore"):
        var = _LazyInverse(wht)
    # the table exactly as the INVVAR header states it (its cards, rounded as written)
    table = read_noise_factors({k: v for k, v, _ in
                                noise_cards(noise.radii_pix, noise.factors, noise.factor_inf)})
    checks, measured = [], float("nan")
    r_depth = r_ap / mgrid.scale
    radii = (r_depth, 2.0, 10.0)
    aps = empty_apertures({"sci": sci, "truth": truth, "var": var}, segm, wht, radii,
                          stream(sc.seed, "depth", b.name), N_EMPTY_APERTURES)
    for r, ap in zip(radii, aps):
        n = ap["sci"].size
        if r == r_depth:
            if n >= MIN_EMPTY_APERTURES:
                measured = depth_from_sums(ap["sci"], zp, ee)
            else:  # a crowded or tiny field: no depth to measure, nothing wrong with the run
                log.warning("band %s: only %d empty sky apertures, measured depth not given",
                            b.name, n)
        if n >= MIN_EMPTY_APERTURES:
            f_r = float(noise_factor(table, r))
            stated = f_r * float(np.median(np.sqrt(ap["var"])))
            checks.append({"radius_pix": round(float(r), 4), "n_apertures": int(n),
                           "stated_factor": round(f_r, 4),
                           "measured_over_stated": robust_sigma(ap["sci"] - ap["truth"])
                           / stated})
    return {
        "aperture_radius_arcsec": r_ap,
        "encircled_energy": ee,
        "predicted_5sigma": predicted_depth(sc.detector, srv.exposure_time_s, srv.n_exposures,
                                            zp, sky, tel.pixel_scale_arcsec, r_ap,
                                            encircled_energy=ee),
        "measured_5sigma": measured,
        "aperture_noise": checks,
    }


class _LazyInverse:
    """1 / wht (0 where wht <= 0), computed on the slices asked for (memory maps stay lazy)."""

    def __init__(self, wht):
        self.wht = wht
        self.shape = wht.shape

    def __getitem__(self, key):
        w = np.asarray(self.wht[key], float)
        return np.where(w > 0, 1.0 / np.where(w > 0, w, 1.0), 0.0)


def _write_exposure_section(f, e, tile, k: int, mgrid: Grid) -> None:
    """The detector pixels tile ``tile`` owns (:func:`simfield.survey.owned_pixels`) of
    exposure ``k``, into its file being written by sections."""
    from .survey import owned_pixels

    y0, y1, x0, x1 = tile.exposures[k]
    own = owned_pixels(tile, k, mgrid)
    for name, data in (("IMAGE", e.sci), ("VARIANCE", e.var), ("FLAGS", e.dq)):
        view = f.array(name)[y0:y1, x0:x1]
        view[own] = data[own]


# ---------------------------------------------------------------------------- helpers
def _stack_sources(a: Table, b: Table) -> Table:
    from astropy.table import vstack

    return vstack([a, b], join_type="outer", metadata_conflicts="silent")


def _icl_source(lens_cfg, members: Table, bands: list[Band]) -> Table:
    """One SOURCES row (kind ``icl``) for the diffuse intracluster light.

    A Sersic envelope (``icl_sersic_n``, ``icl_r_half_arcsec``) centred on the first NFW
    component (else the field centre), elongated like the halo, at the lens redshift, holding
    ``icl_fraction`` of the members' summed flux in every band (the members' colours). It is
    light only: the lens model already holds the cluster's mass.
    """
    nfw = [c for c in lens_cfg.components if c.kind == "nfw"]
    c = nfw[0] if nfw else None
    row = {"kind": ["icl"], "x_arcsec": [c.x_arcsec if c else 0.0],
           "y_arcsec": [c.y_arcsec if c else 0.0], "redshift": [lens_cfg.redshift],
           "abs_mag_uv": [np.nan], "r_half": [lens_cfg.icl_r_half_arcsec],
           "sersic_n": [lens_cfg.icl_sersic_n], "axis_ratio": [c.axis_ratio if c else 1.0],
           "position_angle": [c.position_angle_deg if c else 0.0]}
    for b in bands:
        total = np.nansum(ab_to_njy(np.asarray(members[f"mag_{b.name}"], float)))
        row[f"mag_{b.name}"] = [float(njy_to_ab(lens_cfg.icl_fraction * total))]
    return Table(row)


def _truth_images(sources: Table, lens, sc: Scenario, hx: float, hy: float):
    """IMAGES rows for every source, with total magnification and image count per source."""
    n = len(sources)
    xs = np.asarray(sources["x_arcsec"], float)
    ys = np.asarray(sources["y_arcsec"], float)
    if lens is None:
        images = Table()
        images["source_id"] = np.asarray(sources["id"])
        images["x_arcsec"] = xs
        images["y_arcsec"] = ys
        images["magnification"] = np.ones(n)
        images["parity"] = np.ones(n, dtype=np.int16)
        return images, np.ones(n), np.ones(n, dtype=np.int32)
    from .lensing import lens_sources

    images, mag_total, n_images = lens_sources(lens, sources, sc.lens, (-hx, hx), (-hy, hy))
    return images, np.asarray(mag_total, float), np.asarray(n_images, np.int32)


def _draw_tile(ctx: _TileContext, acc_box, acc_grid: Grid, bright_box,
               bright_any: np.ndarray, lens_box) -> list[Stamp]:
    """Unit-flux stamps, in scene-grid indices, of every source whose light reaches a tile.

    ``acc_box`` is the tile's scene window grown by the core PSF (the light convolved there;
    ``acc_grid`` its window of the scene grid), ``bright_box`` grown by the large PSF, which
    sources bright in some band (``bright_any``) may reach. Lensed sources are ray traced on
    the window of ``acc_box``, bright ones on that of ``lens_box``: the tile grown by the
    large PSF without being cut to the scene grid, so an arc just beyond the scene's edge is
    drawn whole and its light reaches in the same way in every tiling. They are found from the
    window's source-plane bounds (:func:`simfield.lensing.source_plane_bounds`). The diffuse
    intracluster light is drawn over the window only (:func:`simfield.scene.draw_window`).
    """
    import galsim

    from .population.morphology import make_components, make_profile

    sources, sgrid, sc, lens = ctx.sources, ctx.sgrid, ctx.sc, ctx.lens
    xs = np.asarray(sources["x_arcsec"], float)
    ys = np.asarray(sources["y_arcsec"], float)
    xpix, ypix = sgrid.offsets_to_pixel(xs, ys)
    kinds = np.asarray(sources["kind"]).astype(str)
    z = np.asarray(sources["redshift"], float)
    rhalf = np.asarray(sources["r_half"], float)
    two = np.zeros(len(sources), bool)
    if "n_components" in sources.colnames:  # bulge + disk galaxies (population.components)
        two = np.asarray(np.ma.filled(sources["n_components"], 1)) == 2
        r_disk, r_bulge = (np.asarray(np.ma.filled(sources[c], 0.0), float)
                           for c in ("r_half_disk", "r_half_bulge"))
    frame = sgrid.pixel_frame().ravel()  # (xi, eta) -> (column, row) directions
    cap = STAMP_HALF_MAX

    def near(box, pad):
        return ((ypix >= box[0] - pad) & (ypix < box[1] + pad)
                & (xpix >= box[2] - pad) & (xpix < box[3] + pad))

    def overlaps(box, iy0, ix0, n):
        return iy0 < box[1] and iy0 + n > box[0] and ix0 < box[3] and ix0 + n > box[2]

    lensed = np.zeros(len(sources), bool)
    stamps: list[Stamp] = []
    if lens is not None:
        from .lensing import forget_grid, render_lensed, source_plane_bounds

        lensed = (z > sc.lens.redshift) & ~np.isin(kinds, ("member", "icl"))
        # bright lensed sources are ray traced over the window their large-PSF light reaches
        # (on the same 4-pixel node lattice), like bright unlensed ones: over the core window
        # only, a tile lost the spikes of arc parts beyond it; cut to the scene grid, an arc
        # just beyond its edge was drawn to a depth that depended on the tile's window
        # (tests/test_pipeline.py)
        wide_box = (lens_box[0] // 4 * 4, lens_box[1], lens_box[2] // 4 * 4, lens_box[3])
        wide_grid = sgrid.window(wide_box[2], wide_box[0], wide_box[3] - wide_box[2],
                                 wide_box[1] - wide_box[0])
        r_max = 5.0  # arcsec, largest source radius drawn (lensing.render.source_radius)
        for box, grid, which in ((acc_box, acc_grid, lensed & ~bright_any),
                                 (wide_box, wide_grid, lensed & bright_any)):
            if not np.any(which):
                continue
            xlo, xhi, ylo, yhi = source_plane_bounds(lens, grid)
            seen = ((xs > xlo - r_max) & (xs < xhi + r_max) & (ys > ylo - r_max)
                    & (ys < yhi + r_max))
            for i in np.nonzero(which & seen)[0]:
                # lensed galaxies stay one Sersic profile (r_half, sersic_n): bulge and disk
                # lensed apart differed across tile seams (tests/test_pipeline.py), left for
                # later
                row = sources[i]
                if two[i]:
                    row = {k: row[k] for k in row.colnames}
                    row["n_components"] = 1
                prof = make_profile(row, sc.seed)
                for im, iy0, ix0 in render_lensed(lens, prof, xs[i], ys[i], z[i], grid):
                    stamps.append(Stamp(np.asarray(im, np.float32), int(iy0) + box[0],
                                        int(ix0) + box[2], int(i)))
        if wide_box != acc_box:
            forget_grid(lens, wide_grid)
    # the diffuse intracluster light spans the field: every tile draws its window of it
    wanted = (near(acc_box, cap) | (bright_any & near(bright_box, cap)) | (kinds == "icl"))
    for i in np.nonzero(~lensed & wanted)[0]:
        box = bright_box if bright_any[i] else acc_box
        if kinds[i] in POINT_KINDS:
            st = point_stamp(xpix[i], ypix[i], int(i))
            if overlaps(box, st.iy0, st.ix0, 2):
                stamps.append(st)
            continue
        if kinds[i] == "icl":
            prof = galsim.Sersic(float(sources["sersic_n"][i]), half_light_radius=float(rhalf[i]))
            q = float(sources["axis_ratio"][i])
            if q < 1:
                beta = (90.0 - float(sources["position_angle"][i])) * galsim.degrees
                prof = prof.shear(q=q, beta=beta)
            stamps.append(draw_window(prof.transform(*frame), xpix[i], ypix[i], sgrid.scale,
                                      box[0], box[2], box[1] - box[0], box[3] - box[2], int(i)))
            continue
        if two[i]:  # disk and bulge on the same pixels, weighed per band (Stamp.weighted)
            disk, bulge = (p.transform(*frame) for p in make_components(sources[i], sc.seed))
            half = max(stamp_half_size(disk, sgrid.scale), stamp_half_size(bulge, sgrid.scale))
            if not overlaps(box, int(round(ypix[i])) - half, int(round(xpix[i])) - half,
                            2 * half + 1):
                continue
            d, b = (draw_source_stamp(p, xpix[i], ypix[i], sgrid.scale, r / sgrid.scale,
                                      int(i), half)
                    for p, r in ((disk, r_disk[i]), (bulge, r_bulge[i])))
            stamps.append(Stamp(d.image, d.iy0, d.ix0, int(i), bulge=b.image))
            continue
        prof = make_profile(sources[i], sc.seed).transform(*frame)
        half = stamp_half_size(prof, sgrid.scale)
        if not overlaps(box, int(round(ypix[i])) - half, int(round(xpix[i])) - half, 2 * half + 1):
            continue
        stamps.append(draw_source_stamp(prof, xpix[i], ypix[i], sgrid.scale,
                                        float(rhalf[i]) / sgrid.scale, int(i), half))
    return stamps


def _crop_center(img: np.ndarray, half: float) -> np.ndarray:
    h = int(max(1, round(half)))
    cy, cx = img.shape[0] // 2, img.shape[1] // 2
    h = min(h, cy, cx)
    return img[cy - h:cy + h + 1, cx - h:cx + h + 1]


def _nearest_pixels(src: Grid, dst: Grid) -> tuple[np.ndarray, np.ndarray]:
    """(rows, columns) of the ``src`` pixel nearest to each pixel centre of ``dst``: index
    an image on ``src`` with them to look it up on ``dst`` (nearest neighbour, e.g. ids)."""
    xi, eta = dst.pixel_offsets()
    x, y = src.offsets_to_pixel(xi, eta)
    # dst centres often fall on src pixel edges (a scale ratio of 2): round those up, with a
    # bias far above round-off, so every window of src gives the same answer
    ix = np.clip(np.floor(x + 0.5 + 1e-6).astype(np.int64), 0, src.nx - 1)
    iy = np.clip(np.floor(y + 0.5 + 1e-6).astype(np.int64), 0, src.ny - 1)
    return iy, ix


def _image_mags(images: Table, sources: Table, band: str) -> np.ndarray:
    """Observed AB magnitude of each image: intrinsic - 2.5 log10 |mu|."""
    idx = np.asarray(images["source_id"]) - 1
    m = np.asarray(sources[f"mag_{band}"], float)[idx]
    return m - 2.5 * np.log10(np.abs(np.asarray(images["magnification"], float)))
