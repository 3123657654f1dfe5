"""Wavefront drift between exposures: seeded random walk, each exposure's PSF, the mosaic's.

References:
- Random walk (common practice): the variance of the sum of e independent steps grows as e.
- The direct exposure PSF: Fraunhofer diffraction of the pupil with the exposure's segment terms
  added (simfield.optics.psf, checked against the Airy pattern and galsim in test_optics.py).
Small stamps (0.4"), three wavelengths, one band: a few seconds with an empty cache. The run
that writes the mosaic's PSF is tests/test_field_psf.py's (one run for both).
"""

import numpy as np
import pytest

from simfield.errors import ConfigError
from simfield.optics.drift import drift_psf_model, drift_terms
from simfield.optics.psf import band_psf
from simfield.pipeline import make_bands
from tests.conftest import make_scenario


def test_drift_is_a_seeded_random_walk():
    """Steps have rms step_nm over a segment (piston, tip, tilt each of unit rms); the drift's
    variance grows as the number of steps; same seed, same walk; another seed, another."""
    tel = make_scenario("telescope.drift.enabled=true").telescope
    d = drift_terms(tel, 1, 12)
    steps = np.diff(d, axis=0, prepend=0.0)
    assert np.sqrt((steps**2).sum(axis=2).mean()) == pytest.approx(tel.drift.step_nm, rel=0.1)
    v = (d**2).sum(axis=2).mean(axis=1)  # mean square over segments, per exposure
    assert v[11] / v[:3].mean() == pytest.approx(12 / 2, rel=0.5)
    assert np.array_equal(d, drift_terms(tel, 1, 12))
    assert not np.allclose(d, drift_terms(tel, 2, 12))


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    sc = make_scenario("telescope.drift.enabled=true", "telescope.drift.n_modes=3",
                       "telescope.psf.n_wavelengths=3")
    tel, b = sc.telescope, make_bands(sc)[0]
    static = band_psf(tel, b, 0.02, 0.4, sc.seed, pixel_integrated=False).image
    direct = [band_psf(tel, b, 0.02, 0.4, sc.seed, pixel_integrated=False,
                       segment_terms_nm=t).image for t in drift_terms(tel, sc.seed, 3)]
    return sc, b, static, direct


def test_exposure_psfs_and_mosaic_psf(case):
    """With as many modes as exposures each exposure's rendered PSF is its direct PSF and the
    mosaic's PSF their mean; with fewer modes the error stays below the change itself."""
    sc, b, static, direct = case
    tel = sc.telescope
    dr = drift_psf_model(tel, b, 0.02, 0.4, sc.seed, 3, static)
    for e, p in enumerate(direct):
        assert np.abs(p - static).sum() > 0.005  # a measurable change
        np.testing.assert_allclose(dr.exposure_psf(static, e), p, atol=1e-7)
    np.testing.assert_allclose(dr.mosaic, np.mean(direct, axis=0), atol=1e-7)
    assert dr.mosaic.sum() == pytest.approx(1.0, abs=1e-6)
    tel.drift.n_modes = 1
    one = drift_psf_model(tel, b, 0.02, 0.4, sc.seed, 3, static)
    for e, p in enumerate(direct):
        assert np.abs(one.exposure_psf(static, e) - p).sum() < np.abs(p - static).sum()


def test_drift_config_validated():
    """Out-of-range drift settings are refused naming the key (RULES)."""
    for key, value in (("telescope.drift.step_nm", "-1"), ("telescope.drift.n_modes", "0")):
        with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
            make_scenario(f"{key}={value}")
