"""Timing of the photometric-redshift fit: N synthetic objects, default bands, grid, templates.

Run: python benchmarks/bench_photoz.py [N ...] [--dz DZ]. Prints the template build time and
the fit time (wall clock, one process) for N = 1000, 5000, 20000 by default; --dz sets the
grid step in ln(1 + z) (default: the photoz config's 0.01).
"""

import argparse
import time

import numpy as np
from hydra import compose, initialize_config_dir

from simfield.bands import make_band
from simfield.config import CONF_DIR, PhotozConfig, register_configs, to_scenario
from simfield.photoz import build_templates, default_families, fit_photoz, redshift_grid


def main(sizes, dz=None) -> None:
    """Time :func:`fit_photoz` on ``sizes`` objects drawn from the templates with S/N ~10."""
    register_configs()
    with initialize_config_dir(CONF_DIR, version_base=None):
        sc = to_scenario(compose("config"))
    cfg = PhotozConfig() if dz is None else PhotozConfig(dz_over_1pz=dz)
    bands = [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
             for b in sc.telescope.bands]
    t0 = time.perf_counter()
    z = redshift_grid(cfg.z_min, cfg.z_max, cfg.dz_over_1pz)
    tset = build_templates(bands, z, default_families(cfg.betas, cfg.a_v, cfg.line_ew_nm,
                                                      cfg.sf_breaks))
    print(f"templates: {len(tset.names)} x {z.size} redshifts x {len(bands)} bands, "
          f"built in {time.perf_counter() - t0:.2f} s")
    rng = np.random.default_rng(0)
    for n in sizes:
        k = rng.integers(0, len(tset.names), n)
        j = rng.integers(0, z.size, n)
        flux = tset.flux[k, j] * 30.0
        err = np.repeat(np.maximum(flux[:, -1:], 1.0) / 10.0, len(bands), axis=1)
        flux = flux + err * rng.standard_normal(flux.shape)
        t0 = time.perf_counter()
        fit_photoz(flux, err, tset, cfg.z_cuts)
        dt = time.perf_counter() - t0
        print(f"N={n:6d}: fit {dt:6.2f} s ({1e3 * dt / n:.2f} ms per object)")


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("sizes", nargs="*", type=int, default=[1000, 5000, 20000])
    ap.add_argument("--dz", type=float, default=None)
    args = ap.parse_args()
    main(args.sizes, args.dz)
