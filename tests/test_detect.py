"""Tests of simfield.detect: the baseline detector on synthetic mosaics.

Comparison to other codes: GalSim draws the injected sources (galsim.Gaussian), so the expected
fluxes and positions come from outside the project.
"""

import galsim
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.spatial import cKDTree

from simfield.config import DetectionConfig
from simfield.detect import detect_sources
from simfield.errors import ConfigError
from simfield.grid import Grid

SCALE = 0.03  # arcsec/pixel
ZP = 28.0
FWHM = 0.09  # arcsec


def _field(n=25, noise=0.003, seed=7, size=320):
    """Bright, separated Gaussian sources drawn by GalSim at sub-pixel positions, plus noise."""
    rng = np.random.default_rng(seed)
    img = galsim.ImageD(size, size, scale=SCALE)
    gx, gy = np.meshgrid(np.linspace(30, size - 30, 5), np.linspace(30, size - 30, 5))
    x = gx.ravel()[:n] + rng.uniform(-0.5, 0.5, n)
    y = gy.ravel()[:n] + rng.uniform(-0.5, 0.5, n)
    flux = rng.uniform(5.0, 20.0, n)  # e-/s
    for xi, yi, fi in zip(x, y, flux):
        # GalSim positions are 1-based pixel centres
        galsim.Gaussian(fwhm=FWHM, flux=fi).drawImage(
            img, center=galsim.PositionD(xi + 1, yi + 1), add_to_image=True, method="auto")
    sci = img.array + 0.01 + rng.normal(0, noise, img.array.shape)
    wht = np.full(sci.shape, noise**-2)
    return Grid(nx=size, ny=size, scale=SCALE, ra0=53.0, dec0=-27.8), sci, wht, x, y, flux


@pytest.fixture(scope="module")
def detected():
    """Detections on the synthetic field."""
    g, sci, wht, x, y, flux = _field()
    return g, detect_sources(sci, wht, g.wcs, DetectionConfig(), FWHM, ZP, SCALE, exptime=1e4), \
        x, y, flux


def test_finds_every_injected_source_with_position_and_flux(detected):
    """Each GalSim source is found within 0.05 pixel, Kron flux within 3% (a 2.5 r1 Kron
    aperture holds 99% of a Gaussian's light: r1 = sqrt(pi/2) sigma, Kron 1980, ApJS 43, 305)."""
    g, d, x, y, flux = detected
    c = d.catalog
    dist, j = cKDTree(np.column_stack([c["x"], c["y"]])).query(np.column_stack([x, y]))
    assert len(c) == len(x)
    assert dist.max() < 0.05
    assert_allclose(np.asarray(c["flux"])[j], flux, rtol=0.03)
    # AB magnitude from the zero point: m = ZP - 2.5 log10(flux) (definition of ZP_AB)
    assert_allclose(np.asarray(c["mag"])[j], ZP - 2.5 * np.log10(flux), rtol=0, atol=0.035)


def test_sky_positions_follow_the_wcs(detected):
    """RA/Dec of each detection equals astropy's WCS transform of its 0-based pixel position."""
    g, d, *_ = detected
    c = d.catalog
    ra, dec = g.wcs.all_pix2world(c["x"], c["y"], 0)
    assert_allclose(c["ra"], ra, rtol=0, atol=1e-10)
    assert_allclose(c["dec"], dec, rtol=0, atol=1e-10)


def test_aperture_flux_matches_gaussian_enclosed_fraction(detected):
    """Circular-aperture flux = total x (1 - exp(-r^2 / 2 sigma^2)) for a Gaussian (common
    practice), sigma = FWHM / 2.3548."""
    g, d, x, y, flux = detected
    c = d.catalog
    j = cKDTree(np.column_stack([c["x"], c["y"]])).query(np.column_stack([x, y]))[1]
    r = DetectionConfig().aperture_radius_arcsec
    frac = 1 - np.exp(-r**2 / (2 * (FWHM / 2.3548) ** 2))
    assert_allclose(np.asarray(c["flux_aper"])[j], flux * frac, rtol=0.03)


def test_flux_errors_match_scatter_of_empty_apertures():
    """On pure noise of known sigma the aperture error is sigma sqrt(N_pix) (Howell 2006, CCD
    equation in the background-limited case)."""
    g, sci, wht, x, y, flux = _field(n=1)
    d = detect_sources(sci, wht, g.wcs, DetectionConfig(), FWHM, ZP, SCALE)
    r_pix = DetectionConfig().aperture_radius_arcsec / SCALE
    assert_allclose(d.catalog["flux_aper_err"][0], 0.003 * np.sqrt(np.pi * r_pix**2), rtol=0.05)


def test_segmentation_labels_match_catalogue(detected):
    """The segmentation image carries one label per catalogue row, centred on its source."""
    g, d, *_ = detected
    c = d.catalog
    labels = d.segmentation[np.round(c["y"]).astype(int), np.round(c["x"]).astype(int)]
    assert np.array_equal(labels, np.asarray(c["id"]))


def test_pure_noise_gives_few_detections():
    """At 3 sigma on the matched-filtered image with 9 connected pixels, a 320^2 pure-noise
    field gives at most a handful of detections (common practice; regression bound)."""
    rng = np.random.default_rng(0)
    sci = rng.normal(0, 0.003, (320, 320))
    wht = np.full(sci.shape, 0.003**-2)
    g = Grid(nx=320, ny=320, scale=SCALE, ra0=53.0, dec0=-27.8)
    d = detect_sources(sci, wht, g.wcs, DetectionConfig(threshold_sigma=3.0), FWHM, ZP, SCALE)
    assert len(d.catalog) <= 5


def test_rejects_mismatched_weight_shape():
    """A weight map of another shape is refused naming 'wht'."""
    g = Grid(nx=50, ny=50, scale=SCALE, ra0=53.0, dec0=-27.8)
    with pytest.raises(ConfigError, match="wht"):
        detect_sources(np.zeros((50, 50)), np.ones((40, 50)), g.wcs, DetectionConfig(), FWHM,
                       ZP, SCALE)
