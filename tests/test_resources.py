"""Resource estimates against a real run, and the up-front checks of simfield.resources."""

from __future__ import annotations

import numpy as np
import pytest

from simfield.errors import ConfigError
from simfield.pipeline import FIELD_MARGIN_ARCSEC, make_bands
from simfield.population.lightcone import expected_galaxies, make_population
from simfield.random import stream
from simfield.resources import check_writable_folder, check_run, estimate
from tests.conftest import make_scenario

TINY = ["survey=quick", "survey.width_arcsec=8", "survey.height_arcsec=8",
        "telescope.bands=[{name:b17,center_nm:1700,width_nm:380,throughput:0.4,sky_mjy_sr:0.18}]",
        "selection=none",
        "telescope.psf.n_wavelengths=3"]


def test_expected_galaxies_is_the_mean_the_population_draws():
    """expected_galaxies gives the Poisson mean make_population records (and compares with
    population.max_sources), for the luminosity function and the uniform mode."""
    for mode in ("luminosity_function", "uniform"):
        sc = make_scenario("survey=quick", f"population.mode={mode}")
        bands, h = make_bands(sc), 8.0 + FIELD_MARGIN_ARCSEC
        t = make_population(sc.population, bands, (-h, h), (-h, h), stream(sc.seed, "p"))
        np.testing.assert_allclose(expected_galaxies(sc.population, bands, (2 * h) ** 2),
                                   t.meta["expected_candidates"], rtol=1e-12)


@pytest.mark.slow
@pytest.mark.parametrize("lens", ["none", "cluster"])
def test_estimate_matches_the_files_of_a_real_run(tmp_path, lens):
    """The files of a real (tiny) run: their count and total size as estimated (within 15%:
    the tables, plots and headers are modelled by constants fitted to the quick and default
    runs, see the docstring of simfield.resources); the image files exactly, to the FITS
    block (2880 bytes) per extension. A lensed run adds its convergence map, critical curves
    and lens picture (before, the estimate left them out)."""
    from simfield.pipeline import run_scenario

    sc = make_scenario(*TINY, f"lens={lens}")  # the session's PSF cache: test_robustness's PSF
    est = estimate(sc)
    out = tmp_path / "run"
    run_scenario(sc, out)
    files = [p for p in out.rglob("*") if p.is_file()]
    # the command line adds .hydra/ (3), cli.log, job.json; false_examples.png is drawn only
    # when the field has false detections
    assert est.n_files - 6 <= len(files) <= est.n_files - 5
    if lens == "none":
        np.testing.assert_allclose(sum(p.stat().st_size for p in files), est.disk_bytes,
                                   rtol=0.15)
    else:  # what the lens adds, apart from the rest's own scatter (its score page is smaller)
        plain = estimate(make_scenario(*TINY))
        own = [out / n for n in ("convergence.fits", "critical_curves.ecsv", "lens.png")]
        assert est.n_files - plain.n_files == len(own) == 3
        np.testing.assert_allclose(sum(p.stat().st_size for p in own),
                                   est.disk_bytes - plain.disk_bytes, rtol=0.5)
    for name, bytes_per_pixel, n_ext in (("mosaic_b17", 16, 5), ("truth_image_b17", 10, 3),
                                         ("detections_b17", 4, 2)):
        size = (out / f"{name}.fits").stat().st_size
        data = bytes_per_pixel * est.mosaic_pixels
        assert data <= size <= data + (n_ext + 1) * 2880 * 4 + 200_000, (name, size, data)


def test_memory_estimate_grows_with_processes_not_field():
    """More tile processes raise the estimate; a larger field with the same tile size raises it
    only through the parent's share (DEVELOPERS.md: memory grows with workers, not the field)."""
    one = estimate(make_scenario("workers=1", "detection.enabled=false"))
    two = estimate(make_scenario("workers=2", "detection.enabled=false"))
    big = estimate(make_scenario("workers=2", "detection.enabled=false",
                                 "survey.width_arcsec=200", "survey.height_arcsec=200"))
    assert two.memory_bytes > one.memory_bytes
    assert big.scene_window_pixels <= two.scene_window_pixels * 1.01
    assert big.disk_bytes > 3.5 * two.disk_bytes


def test_cache_dir_check_creates_nothing(tmp_path):
    """A new folder under a writable one passes and is not created; a path through a file or
    inside /proc (no blocks: a pseudo file system) is refused."""
    check_writable_folder("k", tmp_path / "a" / "b")
    assert not (tmp_path / "a").exists()
    (tmp_path / "f").write_text("")
    for bad in (tmp_path / "f", tmp_path / "f" / "x", "/proc/simfield"):
        with pytest.raises(ConfigError, match="^invalid configuration: k="):
            check_writable_folder("k", bad)


def test_limits_refuse_with_the_key_that_raises_them():
    """A run over limits.disk_gb / limits.memory_gb is refused naming that key; raising the
    limit lets it pass."""
    with pytest.raises(ConfigError, match=r"limits\.disk_gb.*raise limits\.disk_gb"):
        check_run(make_scenario("survey=quick", "limits.disk_gb=0.01"))
    with pytest.raises(ConfigError, match=r"limits\.memory_gb.*raise limits\.memory_gb"):
        check_run(make_scenario("survey=quick", "limits.memory_gb=0.1"))
    check_run(make_scenario("survey=quick", "limits.disk_gb=1", "limits.memory_gb=1"))
