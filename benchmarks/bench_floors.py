"""Each heavy stage against its floor, as ratios measured in one run.

    python benchmarks/bench_floors.py              # renderer, field, exposures, drizzle, default
    python benchmarks/bench_floors.py renderer exposures drizzle   # some of them
    python benchmarks/bench_floors.py default1     # the default run in one process (workers=1)
    python benchmarks/bench_floors.py dask         # Dask LocalCluster (2 workers) vs local
                                                   # processes at 4x the default area (minutes;
                                                   # run it on a quiet machine)

- renderer: one band's scene window (``accumulate`` + ``convolve_tiled``, after the unit stamps)
  against one whole-window FFT convolution with the same PSF (scipy.fft real transforms of the
  padded window and kernel, their product, the inverse), at the default density and at 4x and
  16x it (the same sources folded into the window).
- field: ``fieldconv.convolve_modes`` (the scene's field-dependent PSF, mean + 4 eigen-PSFs)
  of a 3000^2 window against one whole-window FFT convolution (scipy.fft, kernel transformed
  each time; convolve_modes tiles the window and caches its kernels' transforms).
- exposures: ``detector.expose`` of a 2500 x 2500 window with the default detector and its
  pixel-tied noise against one Poisson and one normal deviate per pixel (numpy's Generator,
  ``poisson(lam)`` at the sky level + ``standard_normal``), the floor named in the notes.
- drizzle: ``survey.drizzle_mosaic`` of 4 exposures onto the default mosaic against the drizzle
  library alone (``Drizzle.add_image`` with the same images, variances, weights and pixel maps,
  the maps made outside the timing).
- default: the default run (``simfield``, subprocess, under ``/usr/bin/time -v`` when present),
  its stage times, and its exposures stage against the deviate floor for its 20 exposures.
  Its stage times are summed over the tile processes, which run side by side and slow each
  other (two processes on two cores share caches and memory bandwidth, and on a two-thread
  core the core itself), while the floor is measured in one process.
- default1: the same run with ``workers=1`` (tiles one after another in one process), so the
  exposures stage and the floor are measured under the same conditions.

Best of ``--repeat`` (3) for the stage timings. The machine's load (``os.getloadavg``) is
printed first: on a shared machine the ratios are steadier than the seconds. Not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def _best(fn, repeat: int) -> float:
    ts = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return min(ts)


def deviate_floor(shape, lam: float, repeat: int) -> float:
    """Seconds for one Poisson (mean ``lam``) and one normal deviate per pixel."""
    rng = np.random.default_rng(0)
    lam_img = np.full(shape, lam)
    return _best(lambda: (rng.poisson(lam_img), rng.standard_normal(shape, np.float32)), repeat)


def _floor_2500(repeat: int) -> float:
    """Seconds of the deviate floor on 2500^2 pixels at the default sky of a 1.7 um band."""
    from simfield.bands import make_band
    from simfield.config import DetectorConfig, SurveyConfig, TelescopeConfig

    det, srv = DetectorConfig(), SurveyConfig(name="deep")
    tel = TelescopeConfig(name="bench", diameter_m=6.1, collecting_area_m2=21.5)
    sky = make_band("b17", 1700.0, 380.0, 0.4, 0.18).sky_rate(tel.collecting_area_m2,
                                                                 tel.pixel_scale_arcsec)
    lam = float(sky) * srv.exposure_time_s * det.n_groups / (det.n_groups - 1)
    return deviate_floor((2500, 2500), lam, repeat)


def bench_exposures(repeat: int) -> float:
    """Print expose vs the deviate floor on 2500^2; return the floor in s per pixel."""
    from simfield.config import DetectorConfig, SurveyConfig, TelescopeConfig
    from simfield.detector import PixelNoise, expose, fixed_pattern_window

    from simfield.bands import make_band

    n = 2500
    det, srv = DetectorConfig(), SurveyConfig(name="deep")
    tel = TelescopeConfig(name="bench", diameter_m=6.1, collecting_area_m2=21.5)
    band = make_band("b17", 1700.0, 380.0, 0.4, 0.18)
    sky = band.sky_rate(tel.collecting_area_m2, tel.pixel_scale_arcsec)
    rate = np.random.default_rng(1).exponential(0.02, (n, n)).astype(np.float32)
    fixed = fixed_pattern_window(det, 1, 0, n, 0, n)

    def one():
        expose(rate, sky, None, det, srv.exposure_time_s, tel.pixel_size_um,
               PixelNoise(1, ("exposure", "b17", 0), 0, 0, (n, n)), fixed)

    one()  # first call: imports
    t = _best(one, repeat)
    floor = _floor_2500(repeat)
    print(f"exposures: expose {n}x{n} {t:.3f} s ({1e9 * t / n / n:.0f} ns/pixel); one Poisson "
          f"+ one normal per pixel {floor:.3f} s ({1e9 * floor / n / n:.0f} ns/pixel); "
          f"ratio {t / floor:.2f}")
    return floor / (n * n)


def bench_renderer(repeat: int, side_arcsec: float = 30.0) -> None:
    """Print the renderer vs one whole-window FFT, at 1x, 4x and 16x the default density."""
    from scipy import fft

    from simfield.optics.psf import cached_band_psf
    from simfield.pipeline import make_bands
    from simfield.population.lightcone import make_population
    from simfield.random import stream
    from simfield.scene import accumulate, convolve_tiled, draw_source_stamp, point_stamp
    from simfield.population.morphology import make_profile
    from tests.conftest import make_scenario

    sc = make_scenario()
    tel = sc.telescope
    band = make_bands(sc)[-1]
    scale = tel.pixel_scale_arcsec / sc.survey.scene_oversample
    npix = int(round(side_arcsec / scale))
    psf = np.asarray(cached_band_psf(tel, band, scale, tel.psf.core_radius_arcsec, sc.seed,
                                     pixel_integrated=False).image, np.float32)
    h = side_arcsec / 2
    for k in (1, 4, 16):
        # k times the density: a field k times wider, folded back into the window
        src = make_population(sc.population, [band], (-h * k, h * k), (-h, h),
                              stream(3, "population"))
        src = src[np.isin(np.asarray(src["kind"]).astype(str), ("galaxy", "star"))]
        xs = (np.asarray(src["x_arcsec"], float) + h * k) % side_arcsec - h
        x = xs / scale + (npix - 1) / 2
        y = np.asarray(src["y_arcsec"], float) / scale + (npix - 1) / 2
        rhalf = np.nan_to_num(np.asarray(src["r_half"], float))
        kinds = np.asarray(src["kind"]).astype(str)
        t0 = time.perf_counter()
        stamps = [point_stamp(x[i], y[i], i) if kinds[i] == "star" else
                  draw_source_stamp(make_profile(src[i], sc.seed), x[i], y[i], scale,
                                    rhalf[i] / scale, i) for i in range(len(src))]
        t_stamps = time.perf_counter() - t0
        rate = np.nan_to_num(10 ** (-0.4 * (np.asarray(src[f"mag_{band.name}"], float)
                                            - band.zeropoint(tel.collecting_area_m2))))
        t_band = _best(lambda: convolve_tiled(accumulate(stamps, rate, (npix, npix)), psf),
                       repeat)
        img = np.random.default_rng(0).random((npix, npix), np.float32)
        shape = [npix + s - 1 for s in psf.shape]
        fshape = [fft.next_fast_len(s, real=True) for s in shape]

        def whole_fft():
            fft.irfft2(fft.rfft2(img, fshape) * fft.rfft2(psf, fshape), fshape)

        t_fft = _best(whole_fft, repeat)
        print(f"renderer: {k:2d}x default density ({len(src)} sources on {npix}^2 scene "
              f"pixels): one band {t_band:.3f} s vs its whole-window FFT {t_fft:.3f} s, ratio "
              f"{t_band / t_fft:.2f} (unit stamps, shared by the bands: {t_stamps:.2f} s)")


def bench_field(repeat: int, n: int = 3000, n_modes: int = 4, k: int = 121) -> None:
    """Print ``convolve_modes`` (mean + ``n_modes`` eigen-PSFs, the field-dependent PSF of the
    scene stage) against one whole-window FFT convolution: the cost per extra mode."""
    from scipy import fft

    from simfield.fieldconv import convolve_modes

    rng = np.random.default_rng(4)
    img = rng.random((n, n), np.float32)
    ker = rng.random((k, k), np.float32)
    modes = [rng.standard_normal((k, k)).astype(np.float32) for _ in range(n_modes)]
    w = [rng.random((n, n), np.float32) for _ in range(n_modes)]
    t = _best(lambda: convolve_modes(img, ker, modes, w), repeat)
    fshape = [fft.next_fast_len(n + k - 1, real=True)] * 2
    t_fft = _best(lambda: fft.irfft2(fft.rfft2(img, fshape) * fft.rfft2(ker, fshape), fshape),
                  repeat)
    print(f"field PSF: convolve_modes {n}^2 with mean + {n_modes} modes {t:.3f} s vs one "
          f"whole-window FFT convolution {t_fft:.3f} s, ratio {t / t_fft:.2f} (tiled, kernel "
          f"transforms cached; {n_modes + 1} forward transforms and one inverse per tile)")


def bench_drizzle(repeat: int) -> None:
    """Print drizzle_mosaic vs the drizzle library alone (4 exposures, default mosaic)."""
    from drizzle.resample import Drizzle

    from simfield.config import SurveyConfig, TelescopeConfig
    from simfield.detector import Exposure
    from simfield.grid import Grid
    from simfield.survey import drizzle_mosaic, mosaic_grid
    from simfield.survey.drizzle import _pixmap

    tel = TelescopeConfig(name="bench", diameter_m=6.1, collecting_area_m2=21.5)
    srv = SurveyConfig(name="deep")
    mg = mosaic_grid(srv)
    n_det = 2550
    rng = np.random.default_rng(2)
    offsets = [(0.0, 0.0), (0.51, 0.013), (0.027, 0.49), (0.53, 0.52)]
    grids = [Grid(nx=n_det, ny=n_det, scale=tel.pixel_scale_arcsec, ra0=srv.ra_deg,
                  dec0=srv.dec_deg, xi0=x - 0.27, eta0=y - 0.26) for x, y in offsets]
    exps = [Exposure(sci=rng.normal(1, 0.1, g.shape).astype(np.float32),
                     var=np.full(g.shape, 0.01, np.float32),
                     var_sky=np.full(g.shape, 0.01, np.float32),
                     dq=np.zeros(g.shape, np.int32), exptime=1000.0, sky=1.0, n_cr=0)
            for g in grids]
    t_sim = _best(lambda: drizzle_mosaic(exps, grids, mg, srv.drizzle_kernel, srv.pixfrac),
                  repeat)
    maps = [_pixmap(g, mg) for g in grids]
    ratio = mg.scale / tel.pixel_scale_arcsec

    def library():
        d = Drizzle(kernel="turbo", out_shape=mg.shape, fillval=0.0, fillval2=0.0,
                    max_ctx_id=len(grids) - 1)
        for e, pm in zip(exps, maps):
            d.add_image(e.sci, exptime=1000.0, pixmap=pm, data2=e.var,
                        dq=e.dq.astype(np.uint32), iscale=ratio * ratio,
                        pixel_scale_ratio=ratio, weight_map=1.0 / e.var_sky,
                        pixfrac=srv.pixfrac, in_units="cps")

    t_lib = _best(library, repeat)
    print(f"drizzle: 4 exposures {n_det}^2 -> {mg.nx}x{mg.ny} mosaic: simfield {t_sim:.3f} s vs "
          f"the drizzle library alone {t_lib:.3f} s, ratio {t_sim / t_lib:.2f}")


def bench_default(floor_per_pixel: float | None, extra: tuple = ()) -> None:
    """Run the default scenario once (subprocess, with overrides ``extra``) and print its
    times."""
    with tempfile.TemporaryDirectory() as tmp:
        cmd = [sys.executable, "-c", "from simfield.cli import main; main()",
               f"hydra.run.dir={tmp}/run", *extra]
        timev = shutil.which("time") or ("/usr/bin/time" if Path("/usr/bin/time").exists()
                                         else None)
        if timev:
            cmd = [timev, "-v"] + cmd
        t0 = time.perf_counter()
        p = subprocess.run(cmd, capture_output=True, text=True, cwd=tmp)
        wall = time.perf_counter() - t0
        if p.returncode != 0:
            print(f"default run failed:\n{p.stderr[-2000:]}")
            return
        timings = json.loads((Path(tmp) / "run" / "summary.json").read_text())["timings_s"]
    print(f"default run{' ' + ' '.join(extra) if extra else ''}: {wall:.1f} s wall")
    for line in p.stderr.splitlines():
        if any(k in line for k in ("Elapsed", "Maximum resident", "User time", "System time",
                                   "Percent of CPU")):
            print(f"  {line.strip()}")
    print("  stages (s; the per-tile stages summed over tile processes): "
          + ", ".join(f"{k} {v:.1f}" for k, v in timings.items()))
    if floor_per_pixel:
        from simfield.resources import estimate
        from tests.conftest import make_scenario

        sc = make_scenario()
        n_pix = estimate(sc).detector_pixels * len(sc.telescope.bands) * sc.survey.n_exposures
        # the machine's speed can drift by tens of per cent within minutes: the floor is
        # measured again after the run, and the ratio given against both
        after = _floor_2500(3) / 2500 ** 2
        floors = [f * n_pix for f in (floor_per_pixel, after)]
        print(f"  exposures stage {timings['exposures']:.1f} s vs the deviate floor for its "
              f"{len(sc.telescope.bands) * sc.survey.n_exposures} exposures "
              f"{floors[0]:.1f} s before the run and {floors[1]:.1f} s after it: ratio "
              f"{timings['exposures'] / floors[0]:.2f} and {timings['exposures'] / floors[1]:.2f}"
              f" (mean of the floors: {timings['exposures'] / np.mean(floors):.2f})")


def bench_dask(repeat: int) -> None:
    """4x the default area: local processes (workers=2) against cluster=local (2 workers)."""
    side = 200.0
    for name, extra in (("local processes, workers=2", ["workers=2"]),
                        ("Dask LocalCluster, 2 workers", ["cluster=local",
                                                          "cluster.n_workers=2"])):
        with tempfile.TemporaryDirectory() as tmp:
            cmd = [sys.executable, "-c", "from simfield.cli import main; main()",
                   f"survey.width_arcsec={side}", f"survey.height_arcsec={side}",
                   "detection.enabled=false", f"hydra.run.dir={tmp}/run", *extra]
            p = subprocess.run(cmd, capture_output=True, text=True, cwd=tmp)
            if p.returncode != 0:
                print(f"{name}: failed\n{p.stderr[-1500:]}")
                continue
            t = json.loads((Path(tmp) / "run" / "summary.json").read_text())["timings_s"]
        print(f"4x default area, {name}: tiles stage {t['tiles']:.1f} s")


def main(argv: list[str]) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("parts", nargs="*",
                    default=["renderer", "field", "exposures", "drizzle", "default"])
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args(argv)
    print(f"load average (1, 5, 15 min): {', '.join(f'{x:.2f}' for x in os.getloadavg())} on "
          f"{os.cpu_count()} cores")
    floor = None
    if "renderer" in a.parts:
        bench_renderer(a.repeat)
    if "field" in a.parts:
        bench_field(a.repeat)
    if any(p in a.parts for p in ("exposures", "default", "default1")):
        floor = bench_exposures(a.repeat)
    if "drizzle" in a.parts:
        bench_drizzle(a.repeat)
    if "default" in a.parts:
        bench_default(floor)
    if "default1" in a.parts:
        bench_default(floor, ("workers=1",))
    if "dask" in a.parts:
        busy = os.getloadavg()[0] > 0.5 * (os.cpu_count() or 1)
        if busy and not os.environ.get("SIMFIELD_BENCH_FORCE"):
            print("dask: the machine is busy (load above half its cores); not run. On a quiet "
                  "machine: python benchmarks/bench_floors.py dask --force")
        else:
            bench_dask(a.repeat)


if __name__ == "__main__":
    if "--force" in sys.argv:
        sys.argv.remove("--force")
        os.environ["SIMFIELD_BENCH_FORCE"] = "1"
    main(sys.argv[1:])
