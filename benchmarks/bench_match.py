"""Timing of the one-to-one matcher: 1e6 truth images x 1e6 detections.

Run: python benchmarks/bench_match.py [n]. Prints wall-clock seconds per stage and the number of
candidate pairs; the target is under 10 s for n = 1e6 on one core.
"""

import sys
import time

import numpy as np

from simfield.score.match import match_positions, match_sky


def main(n: int = 1_000_000) -> None:
    """Time planar and sky matching of ``n`` truth positions against ``n`` detections."""
    rng = np.random.default_rng(0)
    for side, radius in ((600.0, 0.15), (300.0, 0.3)):
        xt = rng.uniform(0, side, n)
        yt = rng.uniform(0, side, n)
        # 80% of detections are truth positions with 0.05" scatter, 20% unrelated
        k = int(0.8 * n)
        xd = np.concatenate([xt[:k] + rng.normal(0, 0.05, k), rng.uniform(0, side, n - k)])
        yd = np.concatenate([yt[:k] + rng.normal(0, 0.05, k), rng.uniform(0, side, n - k)])
        t0 = time.perf_counter()
        res = match_positions(xt, yt, xd, yd, radius)
        dt = time.perf_counter() - t0
        dens = n / side**2
        print(f"planar n={n:.0e} field={side:.0f}\" ({dens:.1f}/arcsec2) r={radius}\": "
              f"{dt:.2f} s, {res.truth_index.size} matches")
    ra0, dec0 = 150.0, 2.0
    rt = ra0 + rng.uniform(-0.08, 0.08, n) / np.cos(np.radians(dec0))
    dt_ = dec0 + rng.uniform(-0.08, 0.08, n)
    rd = rt + rng.normal(0, 0.05 / 3600, n)
    dd = dt_ + rng.normal(0, 0.05 / 3600, n)
    t0 = time.perf_counter()
    res = match_sky(rt, dt_, rd, dd, 0.15)
    print(f"sky n={n:.0e} r=0.15\": {time.perf_counter() - t0:.2f} s, "
          f"{res.truth_index.size} matches")


if __name__ == "__main__":
    main(int(float(sys.argv[1])) if len(sys.argv) > 1 else 1_000_000)
