"""Benchmark: PSF build time per band for the default Lantern telescope.

Run: ``python benchmarks/bench_psf.py [--png outputs/psf_lantern.png] [preset]``. Prints, per
band, the seconds to build the core PSF (radius ``tel.psf.core_radius_arcsec``) and the spike
PSF (radius ``tel.psf.spike_radius_arcsec``) at the default scene pixel
(``pixel_scale_arcsec / survey.scene_oversample``), with FWHM, Strehl and flux fractions.
No caching: every PSF is computed. ``--convergence`` also compares the bluest band's spike PSF
(3 wavelengths) with one computed on a 3x finer pupil raster, by radius.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from hydra import compose, initialize_config_dir

from simfield.bands import make_band
from simfield.config import register_configs, to_scenario
import numpy as np

from simfield.optics import band_psf, effective_psf, make_pupil, write_psf_png
from simfield.optics import psf as psf_module

CONF = Path(__file__).resolve().parents[1] / "conf"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("telescope", nargs="?", default="lantern", help="conf/telescope preset")
    ap.add_argument("--png", default="", help="write a picture of the pupil and spike PSFs")
    ap.add_argument("--convergence", action="store_true", help="pupil-raster convergence table")
    args = ap.parse_args()
    register_configs()
    with initialize_config_dir(config_dir=str(CONF), version_base=None):
        cfg = compose(config_name="config", overrides=[f"telescope={args.telescope}"])
    sc = to_scenario(cfg)
    tel = sc.telescope
    scale = tel.pixel_scale_arcsec / sc.survey.scene_oversample
    bands = [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
             for b in tel.bands]
    print(f"telescope {tel.name}: scene pixel {scale:.4f}\", core radius "
          f"{tel.psf.core_radius_arcsec}\", spike radius {tel.psf.spike_radius_arcsec}\", "
          f"{tel.psf.n_wavelengths} wavelengths per band")
    print(f"{'band':>5} {'core s':>7} {'spike s':>8} {'FWHM':>7} {'eff FWHM':>9} "
          f"{'Strehl':>6} {'core frac':>9} {'spike frac':>10}   (FWHM in arcsec)")
    total = cpu = 0.0
    spikes = []
    for band in bands:
        t0, c0 = time.perf_counter(), time.process_time()
        core = band_psf(tel, band, scale, tel.psf.core_radius_arcsec, seed=sc.seed)
        t1 = time.perf_counter()
        spike = band_psf(tel, band, scale, tel.psf.spike_radius_arcsec, seed=sc.seed)
        t2 = time.perf_counter()
        total += t2 - t0
        cpu += time.process_time() - c0
        spikes.append(spike)
        eff = effective_psf(core, tel.pixel_scale_arcsec)
        print(f"{band.name:>5} {t1 - t0:7.2f} {t2 - t1:8.2f} {core.fwhm_arcsec:7.4f} "
              f"{eff.fwhm_arcsec:9.4f} {core.strehl:6.3f} {core.flux_fraction:9.4f} "
              f"{spike.flux_fraction:10.4f}")
    print(f"all {len(bands)} bands, core + spike: {total:.2f} s wall, "
          f"{cpu:.2f} s CPU (all threads)")
    if args.convergence:
        convergence(tel, bands[0], scale)
    if args.png:
        path = write_psf_png(spikes, make_pupil(tel, grid_size=512), args.png)
        print(f"wrote {path}")


def convergence(tel, band, scale: float) -> None:
    """Print the summed |difference| to a 3x finer pupil raster, per radius range."""
    tel.psf.n_wavelengths = 3
    base = psf_module._PERIOD_FACTOR
    images = {}
    for factor in (base, 3 * base):
        psf_module._PERIOD_FACTOR = factor
        images[factor] = band_psf(tel, band, scale, tel.psf.spike_radius_arcsec).image
    psf_module._PERIOD_FACTOR = base
    ref, img = images[3 * base], images[base]
    n = ref.shape[0]
    yy, xx = np.mgrid[0:n, 0:n] - n // 2
    r = np.hypot(xx, yy) * scale
    print(f"{band.name} spike PSF, raster period {base} vs {3 * base} stamp widths:")
    edges = [0, 1, 3, 5, 7, tel.psf.spike_radius_arcsec, np.inf]
    for r1, r2 in zip(edges[:-1], edges[1:]):
        m = (r >= r1) & (r < r2)
        d = np.abs(img - ref)[m]
        print(f"  {r1:4.1f}-{r2:4.1f}\": sum|diff|/sum {d.sum() / ref[m].sum():.2e}, "
              f"max|diff|/peak {d.max() / ref.max():.2e}")


if __name__ == "__main__":
    main()
