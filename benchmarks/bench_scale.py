"""How simfield scales: the default scenario, the scene renderer against naive per-object
convolution, and time / peak memory against field size and number of sources.

    python benchmarks/bench_scale.py                  # everything (several minutes on 2 cores)
    python benchmarks/bench_scale.py scene            # renderer vs naive GalSim only
    python benchmarks/bench_scale.py scene --side 40  # ... on a 40" x 40" field
    python benchmarks/bench_scale.py default          # the default scenario in a subprocess
    python benchmarks/bench_scale.py sizes            # field size and source count series
    python benchmarks/bench_scale.py sizes --sizes 20 160 --densities 1000
    python benchmarks/bench_scale.py area             # default survey at 1x, 4x, 16x the area
    python benchmarks/bench_scale.py area --areas 1 4 # ... only some of them
    python benchmarks/bench_scale.py dask             # Dask LocalCluster vs processes, 4x area
    python benchmarks/bench_scale.py dask --areas 1   # ... at the default area

Each scenario runs in its own subprocess so that its peak memory (max RSS, from
``resource.getrusage(RUSAGE_CHILDREN)`` after it exits) is its own. The area series also
samples the whole process tree (the run and its tile workers) every 0.25 s and reports the
peak of the summed proportional set size (PSS: pages shared between forked processes are
split between them, so the sum is the machine's memory in use). Not a test: it prints figures
for the notes and for comparing changes.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


# --------------------------------------------------------------------------------------------
# one scenario in a child process
# --------------------------------------------------------------------------------------------
def _child(overrides: list[str]) -> None:
    """Run one scenario in this process and print a JSON line with its figures."""
    from hydra import compose, initialize_config_dir

    from simfield.config import register_configs, to_scenario
    from simfield.pipeline import run_scenario

    register_configs()
    with initialize_config_dir(str(ROOT / "conf"), version_base=None):
        sc = to_scenario(compose("config", overrides=overrides))
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        res = run_scenario(sc, tmp)
        wall = time.perf_counter() - t0
    print("RESULT " + json.dumps({
        "wall_s": wall, "n_sources": res.summary.get("n_sources"),
        "timings_s": res.timings,
        "field_arcmin2": res.summary.get("field_arcmin2"),
    }))


def _tree_pss_mb(root: int) -> float:
    """Summed PSS (MB) of process ``root`` and all its descendants (Linux /proc)."""
    children: dict[int, list[int]] = {}
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as f:
                    ppid = int(f.read().rsplit(")", 1)[1].split()[1])
            except OSError:
                continue
            children.setdefault(ppid, []).append(int(d))
    total, todo = 0.0, [root]
    while todo:
        pid = todo.pop()
        todo.extend(children.get(pid, []))
        try:
            with open(f"/proc/{pid}/smaps_rollup") as f:
                for line in f:
                    if line.startswith("Pss:"):
                        total += int(line.split()[1]) / 1024
                        break
        except OSError:
            pass
    return total


def run_child(overrides: list[str], sample_tree: bool = False) -> dict:
    """Run a scenario in a subprocess: its figures, process wall time and peak RSS (MB).

    Peak RSS comes from GNU time (``/usr/bin/time -f %M``) when installed, otherwise from
    ``getrusage(RUSAGE_CHILDREN)``, which is the largest of all children so far (so only a
    growing series is measured correctly then).
    """
    gtime = Path("/usr/bin/time")
    with tempfile.NamedTemporaryFile("r", suffix=".txt") as f:
        cmd = [sys.executable, __file__, "--child", *overrides]
        if gtime.exists():
            cmd = [str(gtime), "-f", "%M", "-o", f.name, *cmd]
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True)
        peak = [0.0]
        done = threading.Event()

        def sample():
            while not done.wait(0.25):
                peak[0] = max(peak[0], _tree_pss_mb(proc.pid))

        sampler = threading.Thread(target=sample, daemon=True)
        if sample_tree:
            sampler.start()
        stdout, stderr = proc.communicate()
        done.set()
        wall = time.perf_counter() - t0
        r = subprocess.CompletedProcess(cmd, proc.returncode, stdout, stderr)
        if r.returncode != 0:
            raise RuntimeError(f"scenario {overrides} failed:\n{r.stderr[-3000:]}")
        if gtime.exists():
            rss_kb = int(f.read().strip().splitlines()[-1])
        else:
            rss_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    line = next(ln for ln in r.stdout.splitlines() if ln.startswith("RESULT "))
    out = json.loads(line[len("RESULT "):])
    out["max_rss_mb"] = rss_kb / 1024  # Linux reports kB
    out["process_s"] = wall
    if sample_tree:
        out["peak_tree_pss_mb"] = peak[0]
    return out


def bench_default() -> None:
    print("== default scenario (conf/config.yaml), one subprocess")
    r = run_child([])
    print(f"  sources {r['n_sources']}  field {r['field_arcmin2']:.2f} arcmin^2  "
          f"run {r['wall_s']:.1f} s  process {r['process_s']:.1f} s  "
          f"peak RSS {r['max_rss_mb']:.0f} MB")
    for k, v in sorted(r["timings_s"].items(), key=lambda kv: -kv[1]):
        print(f"    {k:12s} {v:8.2f} s")


def bench_sizes(sizes=(10, 20, 40, 80), densities=(500, 2000, 8000, 32000)) -> None:
    print("== time and peak memory vs field size (survey=quick, square field)")
    print(f"  {'side':>6s} {'arcmin2':>8s} {'sources':>8s} {'run s':>8s} {'scene s':>8s} "
          f"{'peak MB':>8s}")
    for side in sizes:
        side = float(side)
        r = run_child(["survey=quick", f"survey.width_arcsec={side}",
                          f"survey.height_arcsec={side}"])
        print(f"  {side:6.0f} {r['field_arcmin2']:8.3f} {r['n_sources']:8d} {r['wall_s']:8.1f} "
              f"{r['timings_s'].get('scene', float('nan')):8.2f} {r['max_rss_mb']:8.0f}")
    print("== time and peak memory vs number of sources (survey=quick 20x20 arcsec, "
          "population=uniform)")
    print(f"  {'per arcmin2':>11s} {'sources':>8s} {'run s':>8s} {'stamps s':>8s} "
          f"{'scene s':>8s} {'detect s':>8s} {'peak MB':>8s}")
    for dens in densities:
        r = run_child(["survey=quick", "survey.width_arcsec=20", "survey.height_arcsec=20",
                          "population=uniform", f"population.uniform_density_arcmin2={dens}"])
        t = r["timings_s"]
        print(f"  {dens:11.0f} {r['n_sources']:8d} {r['wall_s']:8.1f} "
              f"{t.get('stamps', float('nan')):8.2f} {t.get('scene', float('nan')):8.2f} "
              f"{t.get('detect', float('nan')):8.2f} {r['max_rss_mb']:8.0f}")


def bench_area(areas=(1, 4, 16)) -> None:
    """The default scenario with the field side scaled by sqrt(area factor)."""
    print("== default scenario vs field area (side x sqrt(k)), one subprocess each")
    print(f"  {'k':>4s} {'side(as)':>8s} {'sources':>8s} {'run s':>8s} {'s/k':>7s} "
          f"{'tiles s':>8s} {'detect s':>8s} {'score s':>8s} {'maxRSS MB':>9s} {'tree PSS MB':>11s}")
    for k in areas:
        side = 100.0 * float(k) ** 0.5
        r = run_child([f"survey.width_arcsec={side:g}", f"survey.height_arcsec={side:g}",
                       # the guard against mistaken huge fields scales with the field here
                       f"population.max_sources={int(2e5 * max(1.0, k))}"],
                      sample_tree=True)
        t = r["timings_s"]
        print(f"  {k:4g} {side:8.0f} {r['n_sources']:8d} {r['wall_s']:8.1f} "
              f"{r['wall_s'] / k:7.1f} {t.get('tiles', float('nan')):8.1f} "
              f"{t.get('detect', float('nan')):8.1f} {t.get('score', float('nan')):8.1f} "
              f"{r['max_rss_mb']:9.0f} {r['peak_tree_pss_mb']:11.0f}", flush=True)
    print("  (s/k constant = run time linear in area; tree PSS = all processes together)")


def bench_dask(k: float = 4.0, n: int = 2) -> None:
    """The default scenario at ``k`` times the area, its tiles (mosaic and detection) in ``n``
    local processes (``workers=n``) and then on a Dask LocalCluster of ``n`` single-threaded
    worker processes (``cluster=local``); everything else is the same run."""
    side = 100.0 * float(k) ** 0.5
    common = [f"survey.width_arcsec={side:g}", f"survey.height_arcsec={side:g}",
              f"population.max_sources={int(2e5 * max(1.0, k))}"]
    print(f"== default scenario at {k:g}x the area ({side:.0f}\" side): {n} local processes vs "
          f"a Dask LocalCluster of {n} workers, one subprocess each")
    print(f"  {'engine':>22s} {'run s':>7s} {'tiles s':>8s} {'detect s':>8s} {'maxRSS MB':>9s} "
          f"{'tree PSS MB':>11s}  load before -> after (1-min average)")
    for label, extra in ((f"workers={n}", [f"workers={n}"]),
                         (f"cluster=local x{n}", ["cluster=local", f"cluster.n_workers={n}",
                                                   "cluster.threads_per_worker=1",
                                                   "cluster.processes=true"])):
        load0 = os.getloadavg()[0]
        r = run_child(common + extra, sample_tree=True)
        t = r["timings_s"]
        print(f"  {label:>22s} {r['wall_s']:7.1f} {t.get('tiles', float('nan')):8.1f} "
              f"{t.get('detect', float('nan')):8.1f} {r['max_rss_mb']:9.0f} "
              f"{r['peak_tree_pss_mb']:11.0f}  {load0:.1f} -> {os.getloadavg()[0]:.1f}",
              flush=True)
    print("  (maxRSS: the launching process; tree PSS: it and all its worker processes; load "
          f"on {os.cpu_count()} cores: other jobs sharing the machine slow both runs)")


# --------------------------------------------------------------------------------------------
# scene renderer against naive per-object convolution
# --------------------------------------------------------------------------------------------
def bench_scene(side_arcsec: float = 24.0, seed: int = 11) -> None:
    """The renderer against per-object galsim.Convolve on the default population, every band.

    Both draw the same sources (the default light cone over a ``side_arcsec`` square: galaxies
    from ``make_profile`` and stars) with the same band core PSFs (the default telescope's,
    sampled at scene-pixel centres as the pipeline uses them). simfield: unit stamps once
    (``draw_source_stamp``), then per band ``accumulate`` + ``convolve_tiled``. Naive: per band
    and per source, ``galsim.Convolve(profile, InterpolatedImage(psf)).drawImage``.
    """
    import galsim

    from simfield.optics.psf import cached_band_psf
    from simfield.pipeline import make_bands
    from simfield.population.lightcone import make_population
    from simfield.population.morphology import make_profile
    from simfield.random import stream
    from simfield.scene import accumulate, convolve_tiled, draw_source_stamp
    from tests.conftest import make_scenario

    sc = make_scenario()
    tel = sc.telescope
    bands = make_bands(sc)
    scale = tel.pixel_scale_arcsec / sc.survey.scene_oversample
    npix = int(round(side_arcsec / scale))
    h = side_arcsec / 2
    src = make_population(sc.population, bands, (-h, h), (-h, h), stream(seed, "population"))
    src = src[np.isin(np.asarray(src["kind"]).astype(str), ("galaxy", "star"))]
    n = len(src)
    x = np.asarray(src["x_arcsec"], float) / scale + (npix - 1) / 2  # columns along +xi here
    y = np.asarray(src["y_arcsec"], float) / scale + (npix - 1) / 2
    rhalf = np.nan_to_num(np.asarray(src["r_half"], float))
    profiles = [make_profile(src[i], sc.seed) for i in range(n)]
    psfs = {b.name: np.asarray(cached_band_psf(tel, b, scale, tel.psf.core_radius_arcsec,
                                               sc.seed, pixel_integrated=False).image, float)
            for b in bands}
    rates = {b.name: np.nan_to_num(10 ** (-0.4 * (np.asarray(src[f"mag_{b.name}"], float)
                                                  - b.zeropoint(tel.collecting_area_m2))))
             for b in bands}

    # warm GalSim's per-Sersic-index tables (real and Fourier space) for both methods alike:
    # each galaxy has its own index, and whichever method ran first would pay for them
    for i, p in enumerate(profiles):
        if src["kind"][i] != "star":  # point sources have no real-space profile to draw
            p.xValue(0.0, 0.0)
            p.kValue(0.0, 0.0)
            p.drawImage(nx=3, ny=3, scale=scale, method="no_pixel")

    # likewise warm the FFT library's plans for the scene's transform lengths (GalSim keeps
    # its own between objects); each band's kernel transform stays inside the timing below
    convolve_tiled(np.ones((npix, npix), np.float32),
                   np.ones(psfs[bands[0].name].shape, np.float32), workers=1)

    t0 = time.perf_counter()
    stamps = [draw_source_stamp(None if src["kind"][i] == "star" else profiles[i], x[i], y[i],
                                scale, rhalf[i] / scale, i) for i in range(n)]
    t_stamps = time.perf_counter() - t0
    fast, t_band, t_fft = {}, {}, {}
    for b in bands:
        t1 = time.perf_counter()
        acc = accumulate(stamps, rates[b.name], (npix, npix))
        t2 = time.perf_counter()
        # one FFT thread, as GalSim's naive drawing below runs on one core
        fast[b.name] = convolve_tiled(acc, psfs[b.name].astype(np.float32), workers=1)
        t_band[b.name] = time.perf_counter() - t1
        t_fft[b.name] = time.perf_counter() - t2

    naive, t_naive = {}, {}
    for b in bands:
        t1 = time.perf_counter()
        ii = galsim.InterpolatedImage(galsim.ImageD(psfs[b.name], scale=scale))
        full = galsim.ImageD(npix, npix, scale=scale)  # bounds 1..npix: 0-based pixel i is i+1
        for i, p in enumerate(profiles):
            f = float(rates[b.name][i])
            if f <= 0:
                continue
            # the PSF is sampled at pixel centres; the pixel box is GalSim's own (method auto)
            st = galsim.Convolve(p.withFlux(f), ii).drawImage(
                scale=scale, center=galsim.PositionD(x[i] + 1, y[i] + 1))
            bb = st.bounds & full.bounds
            if bb.isDefined():
                full[bb] += st[bb]
        naive[b.name] = full.array
        t_naive[b.name] = time.perf_counter() - t1

    tf = t_stamps + sum(t_band.values())
    tn = sum(t_naive.values())
    first = bands[0].name
    print(f"== scene renderer vs naive per-object convolution: default population, {n} sources "
          f"in {side_arcsec:g}\" x {side_arcsec:g}\" ({npix}^2 scene pixels of {scale:g}\"), "
          f"{len(bands)} bands, core PSFs {psfs[first].shape[0]}^2")
    print(f"  simfield: stamps {t_stamps:.2f} s ({1e3 * t_stamps / n:.2f} ms/source) + "
          f"accumulate/convolve {sum(t_band.values()):.2f} s over {len(bands)} bands = {tf:.2f} s")
    print(f"  naive: {tn:.2f} s ({1e3 * tn / (n * len(bands)):.2f} ms per source per band)")
    mean_naive, mean_band = tn / len(bands), sum(t_band.values()) / len(bands)
    print(f"  speed-up, all bands: {tn / tf:.1f}x; one band incl. stamps: "
          f"{mean_naive / (t_stamps + mean_band):.1f}x; per band after the stamps: "
          f"{np.mean([t_naive[k] / t_band[k] for k in t_band]):.0f}x")
    # the bound of any renderer that convolves the whole scene once per band: the band's
    # convolution alone (kernel transform included), with stamps and their sum for free
    print(f"  convolution alone {1e3 * sum(t_fft.values()) / len(bands):.0f} ms per band: "
          f"ceiling with free stamps and sums {tn / sum(t_fft.values()):.0f}x")
    for b in bands:
        a, c = fast[b.name], naive[b.name]
        inner = (slice(80, -80), slice(80, -80))  # away from the image edge (1.6")
        print(f"  {b.name}: total flux simfield/naive - 1 = {a.sum() / c.sum() - 1:+.2e} "
              f"(inside 1.6\" of the edge {a[inner].sum() / c[inner].sum() - 1:+.2e}); "
              f"max |diff| / peak = {np.abs(a - c).max() / c.max():.2e}")
    # per-source flux in a 0.3" radius aperture, reddest band
    last = bands[-1].name
    a, c = fast[last], naive[last]
    rel = []
    r_ap = 0.3 / scale
    for i in range(n):
        iy, ix = int(round(y[i])), int(round(x[i]))
        if not (20 <= iy < npix - 20 and 20 <= ix < npix - 20):
            continue
        yy, xx = np.mgrid[iy - 16:iy + 17, ix - 16:ix + 17]
        m = (xx - x[i]) ** 2 + (yy - y[i]) ** 2 <= r_ap ** 2
        fa, fc = a[yy[m], xx[m]].sum(), c[yy[m], xx[m]].sum()
        if fc > 0:
            rel.append(fa / fc - 1)
    rel = np.asarray(rel)
    print(f"  {last}: 0.3\" aperture flux per source, simfield/naive - 1: median "
          f"{np.median(rel):+.2e}, 68% range [{np.percentile(rel, 16):+.2e}, "
          f"{np.percentile(rel, 84):+.2e}] (blends included)")


def main(argv: list[str]) -> None:
    if argv[:1] == ["--child"]:
        _child(argv[1:])
        return
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("what", nargs="*", default=["default", "scene", "sizes", "area"],
                   choices=["default", "scene", "sizes", "area", "dask"])
    p.add_argument("--areas", type=float, nargs="+", default=[1, 4, 16],
                   help="field area factors of the area series (default field = 1; "
                   "dask: 4)")
    p.add_argument("--side", type=float, default=24.0,
                   help="field side (arcsec) of the scene comparison")
    p.add_argument("--sizes", type=float, nargs="+", default=[10, 20, 40, 80],
                   help="field sides (arcsec) of the size series")
    p.add_argument("--densities", type=float, nargs="+", default=[500, 2000, 8000, 32000],
                   help="sources per arcmin^2 of the source-count series (20x20 arcsec field)")
    a = p.parse_args(argv)
    for what in a.what:
        if what == "default":
            bench_default()
        elif what == "scene":
            bench_scene(a.side)
        elif what == "area":
            bench_area(a.areas)
        elif what == "dask":
            for k in (a.areas if "--areas" in argv else [4]):
                bench_dask(k)
        else:
            bench_sizes(a.sizes, a.densities)


if __name__ == "__main__":
    main(sys.argv[1:])
