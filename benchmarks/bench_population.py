"""Timing of the population stage: prints sources and seconds per field size (no assertions).

Run: python benchmarks/bench_population.py
"""

from __future__ import annotations

import time

import numpy as np

from simfield.bands import make_band
from simfield.config import PopulationConfig
from simfield.population import make_population, make_profile

BANDS = [make_band("b10", 1000, 220, 0.30), make_band("b13", 1300, 290, 0.35),
         make_band("b17", 1700, 380, 0.40), make_band("b23", 2300, 520, 0.42),
         make_band("b36", 3600, 800, 0.45)]


def main() -> None:
    make_population(PopulationConfig(), BANDS, (-10, 10), (-10, 10), np.random.default_rng(0))
    for mode in ("luminosity_function", "uniform"):
        for half in (30.0, 60.0, 90.0):
            pop = PopulationConfig(mode=mode)
            rng = np.random.default_rng(1)
            t0 = time.perf_counter()
            t = make_population(pop, BANDS, (-half, half), (-half, half), rng)
            dt = time.perf_counter() - t0
            print(f"{mode:20s} field {2 * half:5.0f}\" square: {len(t):6d} sources "
                  f"in {dt:5.2f} s (expected candidates {t.meta['expected_candidates']:.0f})")
    t0 = time.perf_counter()
    for row in t[:2000]:
        make_profile(row)
    print(f"make_profile: {(time.perf_counter() - t0) / 2000 * 1e3:.3f} ms per source")


if __name__ == "__main__":
    main()
