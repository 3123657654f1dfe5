"""How simfield scales: the default scenario, the scene renderer against naive per-object
convolution, and time / peak memory against field size and number of sources.

    python benchmarks/bench_scale.py                  # everything (several minutes on 2 cores)
    python benchmarks/bench_scale.py scene            # renderer vs naive GalSim only
    python benchmarks/bench_scale.py scene --n 400    # ... with 400 galaxies
    python benchmarks/bench_scale.py default          # the default scenario in a subprocess
    python benchmarks/bench_scale.py sizes            # field size and source count series
    python benchmarks/bench_scale.py sizes --sizes 20 160 --densities 1000
    python benchmarks/bench_scale.py area             # default survey at 1x, 4x, 16x the area
    python benchmarks/bench_scale.py area --areas 1 4 # ... only some of them

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
    first = None
    for k in areas:
        side = 100.0 * float(k) ** 0.5
        r = run_child([f"survey.width_arcsec={side:g}", f"survey.height_arcsec={side:g}"],
                      sample_tree=True)
        t = r["timings_s"]
        first = first or r["wall_s"] / k
        print(f"  {k:4g} {side:8.0f} {r['n_sources']:8d} {r['wall_s']:8.1f} "
              f"{r['wall_s'] / k:7.1f} {t.get('tiles', float('nan')):8.1f} "
              f"{t.get('detect', float('nan')):8.1f} {t.get('score', float('nan')):8.1f} "
              f"{r['max_rss_mb']:9.0f} {r['peak_tree_pss_mb']:11.0f}", flush=True)
    print("  (s/k constant = run time linear in area; tree PSS = all processes together)")


# --------------------------------------------------------------------------------------------
# scene renderer against naive per-object convolution
# --------------------------------------------------------------------------------------------
def _psf_image(scale: float):
    """The default telescope's b17 core PSF at the scene scale (project optics), or a GalSim
    Airy when the optics stage is unavailable."""
    import galsim

    try:
        from simfield.bands import make_band
        from simfield.optics.psf import cached_band_psf
        from tests.conftest import make_scenario

        sc = make_scenario()
        tel = sc.telescope
        b = next(b for b in tel.bands if b.name == "b17")
        band = make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
        psf = cached_band_psf(tel, band, scale, tel.psf.core_radius_arcsec, sc.seed)
        return np.asarray(psf.image, float), "simfield optics, b17 core, pixel-integrated"
    except ImportError:
        lam_over_d = 1700e-9 / 6.0 * 206264.806
        img = galsim.Airy(lam_over_d=lam_over_d, obscuration=0.13).drawImage(
            nx=151, ny=151, scale=scale).array
        return img / img.sum(), "galsim.Airy 1700 nm / 6 m (optics stage not importable)"


def bench_scene(n: int = 200, side_arcsec: float = 16.0, seed: int = 11) -> None:
    """draw_stamps + accumulate + convolve_tiled against per-object galsim.Convolve."""
    import galsim

    from simfield.scene import (accumulate, convolve_tiled, draw_stamps, stamp_half_size,
                                supersampling)

    scale = 0.02  # arcsec per scene pixel (the default 0.04" detector pixel / 2)
    npix = int(round(side_arcsec / scale))
    psf, psf_desc = _psf_image(scale)
    rng = np.random.default_rng(seed)
    x = rng.uniform(20, npix - 20, n)
    y = rng.uniform(20, npix - 20, n)
    hlr = np.exp(rng.normal(np.log(0.12), 0.6, n)).clip(0.02, 1.0)  # arcsec
    sersic_n = rng.choice([0.8, 1.0, 1.5, 2.5, 4.0], n)  # few values: GalSim tabulates per n
    e = rng.uniform(0, 0.6, n)
    beta = rng.uniform(0, np.pi, n)
    flux = 10 ** rng.uniform(-1, 2, n)  # e-/s
    profiles = [galsim.Sersic(n=float(sn), half_light_radius=float(r), trunc=float(10 * r),
                              flux_untruncated=True)
                .shear(e=float(ei), beta=float(b) * galsim.radians)
                for sn, r, ei, b in zip(sersic_n, hlr, e, beta)]

    # simfield: unit stamps once, one image per band, one tiled FFT with the PSF
    t0 = time.perf_counter()
    # stamp size and pixel sub-sampling chosen as the pipeline does
    items = ((i, p, x[i], y[i], stamp_half_size(p, scale),
              supersampling(hlr[i] / scale)) for i, p in enumerate(profiles))
    stamps = draw_stamps(items, scale)
    t_stamps = time.perf_counter() - t0
    t1 = time.perf_counter()
    fast = convolve_tiled(accumulate(stamps, flux, (npix, npix)), psf)
    t_conv = time.perf_counter() - t1
    t_fast = time.perf_counter() - t0

    # naive: every galaxy convolved with the PSF on its own, GalSim does the FFT per object
    t0 = time.perf_counter()
    ii = galsim.InterpolatedImage(galsim.ImageD(psf, scale=scale))
    full = galsim.ImageD(npix, npix, scale=scale)  # bounds 1..npix: 0-based pixel i is i+1
    for i, p in enumerate(profiles):
        conv = galsim.Convolve(p.withFlux(float(flux[i])), ii)
        # the PSF image already integrates over scene pixels: sample, do not add a pixel again
        stamp = conv.drawImage(scale=scale, method="no_pixel",
                               center=galsim.PositionD(x[i] + 1, y[i] + 1))
        b = stamp.bounds & full.bounds
        if b.isDefined():
            full[b] += stamp[b]
    naive = full.array
    t_naive = time.perf_counter() - t0

    print(f"== scene renderer vs naive per-object convolution ({n} Sersic galaxies, "
          f"{npix}x{npix} scene pixels of {scale}\", PSF {psf.shape[0]}x{psf.shape[1]}: "
          f"{psf_desc})")
    print(f"  simfield: stamps {t_stamps:.2f} s + accumulate/convolve {t_conv:.2f} s "
          f"= {t_fast:.2f} s")
    print(f"  naive galsim.Convolve(profile, InterpolatedImage(psf)) per object: {t_naive:.2f} s")
    print(f"  speed-up naive / simfield: {t_naive / t_fast:.1f}x "
          f"(per-band cost after the stamps: {t_naive / t_conv:.0f}x)")
    nb = 5  # the default telescope's bands: stamps are drawn once, convolution once per band
    print(f"  for {nb} bands: simfield {t_stamps + nb * t_conv:.2f} s, naive {nb * t_naive:.2f} s, "
          f"speed-up {nb * t_naive / (t_stamps + nb * t_conv):.1f}x")
    tot_f, tot_n = fast.sum(), naive.sum()
    print(f"  total flux: simfield {tot_f:.4f}  naive {tot_n:.4f}  input {flux.sum():.4f} e-/s; "
          f"simfield/naive - 1 = {tot_f / tot_n - 1:+.2e}")
    # per-galaxy flux in a 0.3" radius aperture around each centre, both images
    yy, xx = np.mgrid[:npix, :npix]
    rel = []
    for i in range(n):
        sl = (slice(max(int(y[i]) - 20, 0), int(y[i]) + 21),
              slice(max(int(x[i]) - 20, 0), int(x[i]) + 21))
        m = (xx[sl] - x[i]) ** 2 + (yy[sl] - y[i]) ** 2 <= (0.3 / scale) ** 2
        a, b_ = fast[sl][m].sum(), naive[sl][m].sum()
        if b_ > 0:
            rel.append(a / b_ - 1)
    rel = np.asarray(rel)
    print(f"  0.3\" aperture flux per galaxy, simfield/naive - 1: median {np.median(rel):+.2e}, "
          f"68% range [{np.percentile(rel, 16):+.2e}, {np.percentile(rel, 84):+.2e}], "
          f"max |.| {np.abs(rel).max():.2e}")
    peak = naive.max()
    diff = np.abs(fast - naive)
    iy, ix = np.unravel_index(np.argmax(diff), diff.shape)
    k = int(np.argmin((x - ix) ** 2 + (y - iy) ** 2))
    print(f"  pixel residual: max |simfield - naive| / peak = {diff.max() / peak:.2e}, "
          f"rms / peak = {np.sqrt(np.mean((fast - naive) ** 2)) / peak:.2e}")
    print(f"  largest residual at pixel ({ix}, {iy}), galaxy {k}: Sersic n={sersic_n[k]:g}, "
          f"r_half={hlr[k]:.3f}\" ({hlr[k] / scale:.1f} pix, sub-sampling "
          f"{supersampling(hlr[k] / scale)}); there simfield {fast[iy, ix]:.4g}, naive "
          f"{naive[iy, ix]:.4g} e-/s")


def main(argv: list[str]) -> None:
    if argv[:1] == ["--child"]:
        _child(argv[1:])
        return
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("what", nargs="*", default=["default", "scene", "sizes", "area"],
                   choices=["default", "scene", "sizes", "area"])
    p.add_argument("--areas", type=float, nargs="+", default=[1, 4, 16],
                   help="field area factors of the area series (default field = 1)")
    p.add_argument("--n", type=int, default=200, help="galaxies in the scene comparison")
    p.add_argument("--sizes", type=float, nargs="+", default=[10, 20, 40, 80],
                   help="field sides (arcsec) of the size series")
    p.add_argument("--densities", type=float, nargs="+", default=[500, 2000, 8000, 32000],
                   help="sources per arcmin^2 of the source-count series (20x20 arcsec field)")
    a = p.parse_args(argv)
    for what in a.what:
        if what == "default":
            bench_default()
        elif what == "scene":
            bench_scene(a.n)
        elif what == "area":
            bench_area(a.areas)
        else:
            bench_sizes(a.sizes, a.densities)


if __name__ == "__main__":
    main(sys.argv[1:])
