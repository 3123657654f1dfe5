"""Benchmark of the lensing stage: image finding and lensed rendering of ~5000 sources.

Sources: redshifts uniform in 0.5-10, small Sersic profiles (r_half 0.03-0.3 arcsec, n 0.8-4,
truncated at 5 r_half), positions uniform over the 100 x 100 arcsec field (most of them then
have their images outside the field: the cluster deflects by ~25" at the edge) and, second,
uniform over the central 60 x 60 arcsec of the source plane (about the field's footprint, so
nearly every source lands in the field). Lens: conf/lens/cluster.yaml with its members; scene
grid 5000 x 5000 pixels of 0.02 arcsec. Prints wall times (s) and how the sources were drawn.

Run: /tmp/venv/bin/python benchmarks/bench_lensing.py [n_sources]
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import galsim
import numpy as np
from astropy.table import Table
from omegaconf import OmegaConf

from simfield.bands import make_band
from simfield.config import LensConfig
from simfield.grid import Grid
from simfield.lensing import build_lens, lens_sources, render_lensed
from simfield.lensing import render as lensing_render
from simfield.population.members import make_members
from simfield.scene import stamp_half_size

ROOT = Path(__file__).resolve().parents[1]


def _one(lens, cfg, grid, n, half, rng):
    src = Table({"x_arcsec": rng.uniform(-half, half, n), "y_arcsec": rng.uniform(-half, half, n),
                 "redshift": rng.uniform(0.5, 10.0, n)})
    r_half = rng.uniform(0.03, 0.3, n)
    sersic = rng.uniform(0.8, 4.0, n)
    profiles = [galsim.Sersic(sersic[i], half_light_radius=r_half[i], trunc=5 * r_half[i])
                for i in range(n)]
    t0 = time.perf_counter()
    images, mag, nim = lens_sources(lens, src, cfg, (-50, 50), (-50, 50))
    t_images = time.perf_counter() - t0

    traced = []
    original = lensing_render._ray_trace

    def counting(*args, **kwargs):
        traced.append(1)
        return original(*args, **kwargs)

    lensing_render._ray_trace = counting
    t0 = time.perf_counter()
    n_stamps = 0
    for i in range(n):
        n_stamps += len(render_lensed(lens, profiles[i], src["x_arcsec"][i], src["y_arcsec"][i],
                                      src["redshift"][i], grid))
    t_render = time.perf_counter() - t0
    lensing_render._ray_trace = original

    t0 = time.perf_counter()  # the same sources drawn unlensed, as the scene renderer does
    for prof in profiles:
        half_px = stamp_half_size(prof, 0.02)
        prof.drawImage(nx=3 * (2 * half_px + 1), ny=3 * (2 * half_px + 1), scale=0.02 / 3,
                       method="no_pixel")
    t_unlensed = time.perf_counter() - t0

    print(f"-- {n} sources uniform over +/-{half:g} arcsec")
    print(f"find images (lens_sources)          (s) : {t_images:.2f}")
    print(f"  images {len(images)}, sources with >1 image {int((nim > 1).sum())}, "
          f"with none in the field {int((nim == 0).sum())}")
    print(f"render lensed                       (s) : {t_render:.2f}  ({n_stamps} stamps, "
          f"{len(traced)} sources ray traced)")
    print(f"draw the same sources unlensed      (s) : {t_unlensed:.2f}")


def main(n: int = 5000) -> None:
    cfg = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(LensConfig),
                                              OmegaConf.load(ROOT / "conf/lens/cluster.yaml")))
    tel = OmegaConf.load(ROOT / "conf/telescope/lantern.yaml")
    bands = [make_band(b.name, b.center_nm, b.width_nm, b.throughput) for b in tel.bands]
    rng = np.random.default_rng(12)
    t0 = time.perf_counter()
    members = make_members(cfg, bands, rng, (-50, 50), (-50, 50))
    lens = build_lens(cfg, members)
    t_build = time.perf_counter() - t0
    grid = Grid(5000, 5000, 0.02, 150.0, 2.0)
    t0 = time.perf_counter()
    lensing_render.render_cache(lens, grid)
    t_cache = time.perf_counter() - t0
    print(f"lens components: {len(lens.components)} (NFW, shear, {len(members)} members)")
    print(f"build lens with members             (s) : {t_build:.2f}")
    print(f"render cache on the 5000x5000 grid  (s) : {t_cache:.2f}")
    _one(lens, cfg, grid, n, 50.0, rng)
    _one(lens, cfg, grid, n, 30.0, rng)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 5000)
