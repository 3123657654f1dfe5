"""Time of the forced multi-band photometry on a run folder, against the run's own time.

Runs the default scenario (or the given overrides) into a temporary folder unless ``--run``
names a finished run folder, then times ``simfield.photometry.measure_run`` on it again (the
pipeline's own ``photometry`` timing is printed too) and its peak memory increase. Prints
figures; asserts nothing.

    python benchmarks/bench_photometry.py                 # default run, then photometry
    python benchmarks/bench_photometry.py --run outputs/2026-12-02/14-40-00
    python benchmarks/bench_photometry.py survey=quick
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import tempfile
import time
from pathlib import Path

#: timings the pipeline records inside the ``tiles`` stage (not added to the run's total)
_INSIDE_TILES = {"depth", "stamps", "scene", "truth_image", "exposures", "mosaic", "tiles_cpu"}


def _scenario(overrides):
    from hydra import compose, initialize_config_dir

    from simfield.config import CONF_DIR, register_configs, to_scenario

    register_configs()
    with initialize_config_dir(CONF_DIR, version_base=None):
        return to_scenario(compose("config", overrides=list(overrides)))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run", type=Path, help="finished run folder (default: make one)")
    ap.add_argument("overrides", nargs="*", help="Hydra overrides for the run made here")
    args = ap.parse_args(argv)

    from simfield.config import config_hash, to_yaml
    from simfield.io import Provenance
    from simfield.photometry import measure_run

    if args.run:
        sc = _scenario(args.overrides)  # the overrides the run was made with
        run_dir, summary = args.run, json.loads((args.run / "summary.json").read_text())
    else:
        from simfield.pipeline import run_scenario

        sc = _scenario(args.overrides)
        run_dir = Path(tempfile.mkdtemp(prefix="bench_phot_")) / "run"
        t0 = time.perf_counter()
        summary = run_scenario(sc, run_dir).summary
        print(f"run: {time.perf_counter() - t0:.1f} s wall")
    timings = summary.get("timings_s", {})
    total = sum(v for k, v in timings.items() if k not in _INSIDE_TILES)
    prov = Provenance(sc.seed, config_hash(sc), to_yaml(sc))
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    res = measure_run(run_dir, sc, prov)
    dt = time.perf_counter() - t0
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(f"run folder: {run_dir}")
    print(f"detections: {res['n_rows']} in {res['detection_band']}, bands {res['bands']}, "
          f"matched to {res['match_to']}")
    print(f"photometry (again, here): {dt:.2f} s; peak RSS +{(rss1 - rss0) / 1024:.0f} MB")
    if total:
        in_run = timings.get("photometry")
        print(f"stages of the run: {total:.1f} s; photometry in the run: "
              f"{in_run if in_run is None else round(in_run, 2)} s "
              f"({100 * (in_run or dt) / total:.1f}% of the run)")
    print("median S/N of the detections:",
          {b: None if v is None else round(v, 1) for b, v in res["median_snr"].items()})
    print("matched / native aperture noise:", res["noise_ratio"])


if __name__ == "__main__":
    main(sys.argv[1:])
