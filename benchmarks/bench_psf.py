"""Benchmark: PSF build time per band for the default Lantern telescope.

Run: ``python benchmarks/bench_psf.py [--png outputs/psf_lantern.png] [preset]``. Prints, per
band, the seconds to build the core PSF (radius ``tel.psf.core_radius_arcsec``) and the spike
PSF (radius ``tel.psf.spike_radius_arcsec``) at the default scene pixel
(``pixel_scale_arcsec / survey.scene_oversample``), with FWHM, Strehl and flux fractions.
No caching: every PSF is computed.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from hydra import compose, initialize_config_dir

from simfield.bands import make_band
from simfield.config import register_configs, to_scenario
from simfield.optics import band_psf, effective_psf, make_pupil, write_psf_png

CONF = Path(__file__).resolve().parents[1] / "conf"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("telescope", nargs="?", default="lantern", help="conf/telescope preset")
    ap.add_argument("--png", default="", help="write a picture of the pupil and spike PSFs")
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
    total = 0.0
    spikes = []
    for band in bands:
        t0 = time.perf_counter()
        core = band_psf(tel, band, scale, tel.psf.core_radius_arcsec, seed=sc.seed)
        t1 = time.perf_counter()
        spike = band_psf(tel, band, scale, tel.psf.spike_radius_arcsec, seed=sc.seed)
        t2 = time.perf_counter()
        total += t2 - t0
        spikes.append(spike)
        eff = effective_psf(core, tel.pixel_scale_arcsec)
        print(f"{band.name:>5} {t1 - t0:7.2f} {t2 - t1:8.2f} {core.fwhm_arcsec:7.4f} "
              f"{eff.fwhm_arcsec:9.4f} {core.strehl:6.3f} {core.flux_fraction:9.4f} "
              f"{spike.flux_fraction:10.4f}")
    print(f"all {len(bands)} bands, core + spike: {total:.2f} s")
    if args.png:
        path = write_psf_png(spikes, make_pupil(tel, grid_size=512), args.png)
        print(f"wrote {path}")


if __name__ == "__main__":
    main()
