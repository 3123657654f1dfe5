"""Run a scenario in-process and print wall time per stage and peak memory.

    python benchmarks/bench_run.py                 # the default scenario
    python benchmarks/bench_run.py survey=quick    # any Hydra overrides

Not a test: it prints figures for the issue notes and for comparing changes.
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
from pathlib import Path

from hydra import compose, initialize_config_dir

from simfield.config import register_configs, to_scenario
from simfield.pipeline import run_scenario

CONF = str(Path(__file__).resolve().parent.parent / "conf")


def main(overrides: list[str]) -> None:
    register_configs()
    with initialize_config_dir(CONF, version_base=None):
        sc = to_scenario(compose("config", overrides=overrides))
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        res = run_scenario(sc, tmp)
        wall = time.perf_counter() - t0
    print(f"scenario: {' '.join(overrides) or '(default)'}")
    print(f"sources: {res.summary['n_sources']}  images: {res.summary['n_images']}")
    for name, t in res.timings.items():
        print(f"  {name:12s} {t:8.2f} s")
    print(f"  {'total':12s} {wall:8.2f} s")
    print("(stage times of the per-band stages are summed over the band worker processes)")
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"peak memory (max RSS): main process {own:.0f} MB, largest band worker {kids:.0f} MB")


if __name__ == "__main__":
    main(sys.argv[1:])
