"""Wall time of the detector and survey stages at the default size.

One 2600 x 2600 detector exposure (sampling the 0.02" scene, then the ramp model) and one
4-exposure drizzle onto the 3333 x 3333 mosaic of the default deep field. Prints seconds.

    python benchmarks/bench_detector.py
"""

from __future__ import annotations

import time

from simfield.bands import make_band
from simfield.config import DetectorConfig, SurveyConfig, TelescopeConfig
from simfield.detector import expose, make_fixed_pattern
from simfield.grid import Grid
from simfield.random import stream
from simfield.survey import drizzle_mosaic, mosaic_grid, sample_scene


def main() -> None:
    """Time sampling, exposure and drizzle; print the figures."""
    tel = TelescopeConfig(name="bench", diameter_m=6.1, collecting_area_m2=21.5)
    survey = SurveyConfig(name="deep")
    det = DetectorConfig()
    band = make_band("b17", 1700.0, 380.0, 0.4, 0.18)
    sky = band.sky_rate(tel.collecting_area_m2, tel.pixel_scale_arcsec)
    n_det = 2600
    scale = tel.pixel_scale_arcsec / survey.scene_oversample
    n_scene = n_det * survey.scene_oversample + 40
    sg = Grid(nx=n_scene, ny=n_scene, scale=scale, ra0=survey.ra_deg, dec0=survey.dec_deg)
    rng = stream(0, "bench")
    scene = rng.exponential(0.001, sg.shape)
    offsets = [(0.0, 0.0), (0.51, 0.013), (0.027, 0.49), (0.53, 0.52)]
    grids = [Grid(nx=n_det, ny=n_det, scale=tel.pixel_scale_arcsec, ra0=survey.ra_deg,
                  dec0=survey.dec_deg, xi0=x - 0.27, eta0=y - 0.26) for x, y in offsets]
    t0 = time.perf_counter()
    fixed = make_fixed_pattern(grids[0].shape, det, stream(0, "fixed"))
    print(f"fixed pattern {n_det}x{n_det}: {time.perf_counter() - t0:.2f} s")
    exposures = []
    for g in grids:
        t0 = time.perf_counter()
        rate = sample_scene(scene, sg, g)
        t1 = time.perf_counter()
        e = expose(rate, sky, None, det, survey.exposure_time_s, tel.pixel_size_um,
                   stream(0, "exp", len(exposures)), fixed)
        t2 = time.perf_counter()
        exposures.append(e)
        print(f"exposure {len(exposures)}: sample {t1 - t0:.2f} s, expose {t2 - t1:.2f} s, "
              f"total {t2 - t0:.2f} s ({e.n_cr} cosmic rays)")
    mg = mosaic_grid(survey)
    t0 = time.perf_counter()
    drizzle_mosaic(exposures, grids, mg, survey.drizzle_kernel, survey.pixfrac)
    print(f"drizzle 4 exposures -> {mg.nx}x{mg.ny} mosaic: {time.perf_counter() - t0:.2f} s")
    rolled = Grid(nx=n_det, ny=n_det, scale=tel.pixel_scale_arcsec, ra0=survey.ra_deg,
                  dec0=survey.dec_deg, roll_deg=20.0)
    t0 = time.perf_counter()
    sample_scene(scene, sg, rolled)
    print(f"sample with roll (general path): {time.perf_counter() - t0:.2f} s")


if __name__ == "__main__":
    main()
