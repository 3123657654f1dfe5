"""Time and headline numbers of the selection scoring on a finished run.

    python benchmarks/bench_selection.py outputs/<run> [--mock-photometry] [--seed 1]

With ``--mock-photometry`` (for runs made before the photometry stage existed) a stand-in
``photometry.fits`` is written first: every detection of the detection band gets, in each band,
the truth flux of its matched truth image (0 if unmatched) plus Gaussian noise of the run's
measured 5-sigma depth (sigma = f(depth) / 5), seeded explicitly. It is a mock for exercising
the selection, not a photometry: blending, PSF matching and aperture losses are absent.
Prints per sample: selected, purity, the contamination classes, expected versus observed
counts in the window and the wall time.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

from simfield.config import ScoreConfig
from simfield.score.run import load_truth, match_to_truth, run_scenario_of


def mock_photometry(run: Path, seed: int) -> None:
    """Write ``photometry.fits`` from the truth and depths (see the module docstring)."""
    summ = json.loads((run / "summary.json").read_text())
    band = next(iter(summ["detections"]))
    det = Table.read(run / f"detections_{band}.fits", hdu="DETECTIONS")
    truth = load_truth(run, band)
    _, images, _, _, m = match_to_truth(truth, det, ScoreConfig())
    rng = np.random.default_rng(seed)
    depth = summ["depth_ab"]
    ph = Table({"id": det["id"] if "id" in det.colnames else np.arange(1, len(det) + 1),
                "ra": det["ra"], "dec": det["dec"]})
    for b, d in depth.items():
        m5 = d.get("measured_5sigma") or d["predicted_5sigma"]
        sig = 10 ** (-0.4 * (float(m5) - 31.4)) / 5.0
        f = np.zeros(len(det))
        mag = np.asarray(images[f"mag_{b}"], float)[m.truth_index]
        f[m.det_index] = np.where(np.isfinite(mag), 10 ** (-0.4 * (mag - 31.4)), 0.0)
        ph[f"flux_{b}"] = f + rng.normal(0.0, sig, f.size)
        ph[f"flux_err_{b}"] = np.full(f.size, sig)
        ph[f"flags_{b}"] = np.zeros(f.size, np.int16)
    ph.meta["DETBAND"] = band
    hdu = fits.table_to_hdu(ph)
    hdu.name = "PHOTOMETRY"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(run / "photometry.fits", overwrite=True)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("run")
    p.add_argument("--mock-photometry", action="store_true")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--presets", help="selection preset YAML to use instead of the run's own "
                                     "(e.g. conf/selection/dropouts.yaml)")
    a = p.parse_args()
    run = Path(a.run)
    if a.mock_photometry:
        mock_photometry(run, a.seed)
    from simfield.selection import score_run_selection

    sc = run_scenario_of(run)
    if a.presets:
        from omegaconf import OmegaConf

        from simfield.config import SelectionConfig, _validate_selection

        sc.selection = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(SelectionConfig),
                                                           OmegaConf.load(a.presets)))
        _validate_selection(sc.selection, sc.band_names, sc.population.z_max)
        sc.selection.report = False
    t0 = time.perf_counter()
    res = score_run_selection(run, sc)
    dt = time.perf_counter() - t0
    for name, s in res.items():
        cw = s["counts_window"]
        cont = ", ".join(f"{k} {v}" for k, v in s["contamination"].items() if v)
        pur = "n/a" if s["purity"] is None else f"{s['purity']:.2f}"
        print(f"{name:4s} window {s['z_window']}: {s['n_selected']} selected, purity {pur} "
              f"({cont}); truth in window {s['n_truth_in_window']}; observed {cw['n_observed']}"
              f" expected {cw['n_expected']:.2f} P(N=obs) {cw['p_equal']:.3f} "
              f"P(N=0) {cw['p_zero']:.3f}")
    print(f"selection scoring: {dt:.1f} s for {len(res)} samples")


if __name__ == "__main__":
    main()
