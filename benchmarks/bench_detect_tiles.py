"""Peak memory and time of run_detection, tiled and untiled, on a large synthetic mosaic.

Writes a mosaic of ``--size`` x ``--size`` pixels at 0.04"/pixel (flat sky + Gaussian noise +
circular Gaussian sources, written by sections with simfield.io.section_files so the writer
itself holds only a block of rows), then runs simfield.detect.run_detection in a fresh child
process twice: with the default tiles, and as one tile (TILE_CORE_PIX set larger than the
mosaic, the behaviour before tiling). Each child reports its peak resident set size
(resource.getrusage, ru_maxrss) and wall time. Prints figures; asserts nothing.

    /tmp/venv/bin/python benchmarks/bench_detect_tiles.py --size 10000 --sources 12000
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SCALE = 0.04  # arcsec/pixel
FWHM = 0.16  # arcsec, PSF of the synthetic sources
NOISE = 0.003  # e-/s per pixel
SKY = 0.01  # e-/s per pixel
BAND = "b36"


def _scenario():
    """The default scenario from conf/, detecting the benchmark band."""
    from hydra import compose, initialize_config_dir

    from simfield.config import register_configs, to_scenario

    register_configs()
    conf = str(Path(__file__).resolve().parent.parent / "conf")
    with initialize_config_dir(conf, version_base=None):
        cfg = compose("config", overrides=[f"detection.bands=[{BAND}]"])
    return to_scenario(cfg)


def write_mosaic(run_dir: Path, size: int, n_sources: int, seed: int = 1) -> None:
    """Write ``mosaic_<band>.fits`` and ``psf_<band>.fits`` into ``run_dir`` by row blocks."""
    from astropy.io import fits

    from simfield.grid import Grid
    from simfield.io import ImageSpec, Provenance, section_files

    rng = np.random.default_rng(seed)
    g = Grid(nx=size, ny=size, scale=SCALE, ra0=150.0, dec0=2.0)
    hdr = g.wcs.to_header()
    hdr["ZP_AB"], hdr["EXPTIME"], hdr["BUNIT"] = 28.0, 1e4, "electron/s"
    x = rng.uniform(0, size - 1, n_sources)
    y = rng.uniform(0, size - 1, n_sources)
    flux = 10 ** rng.uniform(-1.5, 1.0, n_sources)  # e-/s
    # observed sigma^2 = PSF^2 + intrinsic^2 (pixels); FWHM = 2 sqrt(2 ln 2) sigma
    sig = np.hypot(FWHM / SCALE / 2.3548, rng.uniform(0.0, 3.0, n_sources))
    half = np.ceil(5 * sig).astype(int)
    order = np.argsort(y)
    x, y, flux, sig, half = x[order], y[order], flux[order], sig[order], half[order]
    prov = Provenance(seed, "bench", "bench: detect tiles")
    specs = [ImageSpec("IMAGE", (size, size), np.float32, hdr),
             ImageSpec("INVVAR", (size, size), np.float32, hdr),
             ImageSpec("EXPOSURE", (size, size), np.float32, hdr),
             ImageSpec("FLAGS", (size, size), np.int32, [("FNODATA", 1, "no-data bit")])]
    rows = 500
    with section_files([(run_dir / f"mosaic_{BAND}.fits", specs, [])], prov) as (f,):
        sci, wht, exp_ = f.array("IMAGE"), f.array("INVVAR"), f.array("EXPOSURE")
        for r0 in range(0, size, rows):
            r1 = min(size, r0 + rows)
            blk = SKY + rng.normal(0, NOISE, (r1 - r0, size))
            lo, hi = np.searchsorted(y, [r0 - 40, r1 + 40])
            for i in range(lo, hi):
                h = half[i]
                ya, yb = max(r0, int(y[i]) - h), min(r1, int(y[i]) + h + 1)
                xa, xb = max(0, int(x[i]) - h), min(size, int(x[i]) + h + 1)
                if ya >= yb or xa >= xb:
                    continue
                yy, xx = np.mgrid[ya:yb, xa:xb]
                blk[ya - r0:yb - r0, xa:xb] += flux[i] / (2 * np.pi * sig[i] ** 2) * np.exp(
                    -((xx - x[i]) ** 2 + (yy - y[i]) ** 2) / (2 * sig[i] ** 2))
            sci[r0:r1] = blk
            wht[r0:r1] = NOISE ** -2
            exp_[r0:r1] = 1e4
        del sci, wht, exp_
    psf = fits.ImageHDU(np.ones((5, 5), np.float32), name="PSF_DET")
    psf.header["FWHM"] = FWHM
    fits.HDUList([fits.PrimaryHDU(), psf]).writeto(run_dir / f"psf_{BAND}.fits",
                                                   overwrite=True)


def _child(run_dir: Path, mode: str) -> None:
    from simfield import detect
    from simfield.io import Provenance

    if mode == "untiled":
        import functools

        from astropy.convolution import convolve_fft

        detect.TILE_CORE_PIX = 1 << 20
        # one whole-mosaic FFT of more than 1 GB is refused by astropy unless allowed
        detect.convolve_fft = functools.partial(convolve_fft, allow_huge=True)
    sc = _scenario()
    t0 = time.perf_counter()
    counts = detect.run_detection(run_dir, sc, None, Provenance(1, "bench", "bench"))
    dt = time.perf_counter() - t0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB -> MB (Linux)
    print(json.dumps({"mode": mode, "seconds": dt, "peak_rss_mb": rss,
                      "detections": counts[BAND]}))


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--size", type=int, default=10000)
    p.add_argument("--sources", type=int, default=12000)
    p.add_argument("--modes", default="tiled,untiled")
    p.add_argument("--dir", help="run directory (default: a temporary one)")
    p.add_argument("--child", help=argparse.SUPPRESS)
    a = p.parse_args()
    if a.child:
        _child(Path(a.dir), a.child)
        return
    tmp = None
    if a.dir:
        run_dir = Path(a.dir)
        run_dir.mkdir(parents=True, exist_ok=True)
    else:
        tmp = tempfile.TemporaryDirectory()
        run_dir = Path(tmp.name)
    if not (run_dir / f"mosaic_{BAND}.fits").is_file():
        t0 = time.perf_counter()
        write_mosaic(run_dir, a.size, a.sources)
        print(f"mosaic {a.size}x{a.size} with {a.sources} sources written in "
              f"{time.perf_counter() - t0:.1f} s "
              f"(writer peak RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f}"
              " MB)", flush=True)
    for mode in a.modes.split(","):
        out = subprocess.run([sys.executable, __file__, "--child", mode, "--dir", str(run_dir)],
                             capture_output=True, text=True)
        if out.returncode:
            print(f"{mode:8s}: failed: {out.stderr.strip().splitlines()[-1]}", flush=True)
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{mode:8s}: {r['seconds']:7.1f} s, peak RSS {r['peak_rss_mb']:7.0f} MB, "
              f"{r['detections']} detections", flush=True)
    if tmp is not None:
        tmp.cleanup()


if __name__ == "__main__":
    main()
