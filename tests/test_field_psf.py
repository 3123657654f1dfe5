"""Field-dependent PSF: aberration model, interpolation, multi-term convolution, PSF file.

References:
- Born & Wolf, Principles of Optics (7th ed.), sec. 5.3: the Seidel field curvature and
  astigmatism of an off-axis image grow as the square of the field angle, the astigmatic
  focal lines lying along and across the field radius [mem].
- The direct PSF: Fraunhofer diffraction of the pupil with the field's wavefront terms added
  (simfield.optics.psf, checked against the Airy pattern and galsim in test_optics.py).
- scipy.signal.fftconvolve as the reference for convolving one source with one PSF.
- GalSim HSM adaptive moments for the ellipticity written in the PSF file.
Small stamps (0.5" core), one band, a 3 x 3 grid: a few seconds with an empty cache.
"""

import galsim
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from scipy import signal

from simfield.errors import ConfigError
from simfield.fieldconv import convolve_modes
from simfield.optics.field import field_psf_model, field_zernike, psf_at_position
from simfield.optics.psf import band_psf
from simfield.pipeline import make_bands, run_scenario
from tests.conftest import make_scenario
from tests.test_pipeline import small_scenario

HALF = 50.0  # arcsec: half-side of the default field
SCALE, RADIUS = 0.02, 0.5  # arcsec


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    sc = make_scenario("telescope.field_psf.enabled=true")
    b = make_bands(sc)[0]  # b10: the largest effect
    return sc, b, field_psf_model(sc.telescope, b, SCALE, RADIUS, sc.seed, HALF, HALF)


def _direct(sc, b, u, v):
    z = field_zernike(sc.telescope, u, v, HALF, HALF)
    return band_psf(sc.telescope, b, SCALE, RADIUS, sc.seed, pixel_integrated=False,
                    field_zernike_nm=tuple(z)).image


def test_field_terms_grow_as_field_angle_squared_along_the_radius():
    """Focus ~ (r / r_corner)^2; astigmatism of the same growth with its axis along the field
    radius (Noll 6 = cos 2 theta on the x axis, -cos on y, Noll 5 = sin 2 theta at 45 deg),
    as the Seidel terms (Born & Wolf sec. 5.3 [mem])."""
    tel = make_scenario().telescope
    f = tel.field_psf
    rc = np.hypot(HALF, HALF)
    z = field_zernike(tel, np.array([HALF, HALF, 0.0, 0.0]), np.array([HALF, 0.0, HALF, 0.0]),
                      HALF, HALF)
    np.testing.assert_allclose(z[0], f.corner_focus_nm * np.array([1, 0.5, 0.5, 0]), atol=1e-9)
    q = (HALF / rc) ** 2
    np.testing.assert_allclose(z[1], [f.corner_astig_nm, 0, 0, 0], atol=1e-9)  # 45 deg: sin
    np.testing.assert_allclose(z[2], [0, f.corner_astig_nm * q, -f.corner_astig_nm * q, 0],
                               atol=1e-9)


def test_interpolated_psf_matches_direct_off_grid(model):
    """At field points between the grid points the interpolated PSF differs from the PSF
    computed directly there by < 4% of the flux (sum |diff|), and by < 20% of how much the
    PSF changes from the centre to the corner; at a grid point it is the direct PSF."""
    sc, b, m = model
    change = np.abs(m.at(HALF, HALF) - m.at(0, 0)).sum()
    assert change > 0.1
    for u, v in ((20.0, -35.0), (-37.0, 12.0)):
        d = _direct(sc, b, u, v)
        err = np.abs(m.at(u, v) - d).sum()
        assert err < 0.04 and err < 0.2 * change, (u, v, err, change)
    np.testing.assert_allclose(m.at(HALF, -HALF), _direct(sc, b, HALF, -HALF), atol=1e-6)
    assert m.at(13.0, 7.0).sum() == pytest.approx(1.0, abs=1e-9)


def test_corner_psf_wider_and_more_elongated(model):
    """The most elongated corner's PSF (GalSim HSM adaptive moments) is measurably more
    elongated and wider than the centre's."""
    _, _, m = model
    u, v = m.worst_corner()
    e = {}
    for key, (uu, vv) in (("centre", (0.0, 0.0)), ("corner", (u, v))):
        img = galsim.Image(m.at(uu, vv), scale=SCALE)
        e[key] = galsim.hsm.FindAdaptiveMom(img).observed_shape.g
    assert e["corner"] > e["centre"] + 0.02, e
    assert m.fwhm_arcsec[-1 if v > 0 else 0, -1 if u > 0 else 0] > m.fwhm_arcsec[1, 1]


def test_each_source_is_spread_by_its_own_psf(model):
    """convolve_modes on two point sources, at the centre and at a corner of a field mapped
    onto a small image, gives at each the field model's PSF there (scipy fftconvolve of each
    point with its own PSF as the reference)."""
    _, _, m = model
    n = 201
    img = np.zeros((n, n), np.float64)
    pts = [(100, 100), (30, 170)]  # (row, column)
    for r, c in pts:
        img[r, c] = 1.0
    # field position of each column / row: the image spans the field -HALF .. HALF
    u = np.linspace(-HALF, HALF, n)
    out = convolve_modes(img, m.mean, m.modes, m.weight_maps(u, u))
    ref = np.zeros_like(img)
    for r, c in pts:
        one = np.zeros_like(img)
        one[r, c] = 1.0
        ref += signal.fftconvolve(one, m.at(u[c], u[r]), mode="same")
    np.testing.assert_allclose(out, ref, atol=1e-7 * ref.max())


def test_run_writes_centre_and_corner_shape_and_truth_psf(tmp_path):
    """A run with the field-dependent PSF and wavefront drift: psf_<band>.fits has FWHM and
    ellipticity cards at the centre and the most elongated corner that differ, equal to GalSim
    HSM measures of psf_at_position at those mosaic pixels; the mosaic's effective PSF
    (PSF_MOSAIC: unit sum, not the static PSF) is the mean of the exposures' (PSF_EXPOSURES);
    psf.png is written."""
    sc = small_scenario(tmp_path, "telescope.field_psf.enabled=true", "detection.enabled=false",
                        "photometry.enabled=false", "score.enabled=false",
                        "selection.enabled=false", "telescope.drift.enabled=true",
                        "telescope.psf.n_wavelengths=3")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name == "b13"]
    sc.telescope.psf.core_radius_arcsec = 0.5
    res = run_scenario(sc, tmp_path / "run")
    path = res.out_dir / "psf_b13.fits"
    h = fits.getheader(path, "PSF")
    t = Table.read(path, hdu="FIELD_GRID")
    assert h["ELLCOR"] > h["ELLCEN"] + 0.01 and h["FWHMCOR"] != h["FWHMCEN"]
    for key, (u, v) in (("CEN", (0.0, 0.0)), ("COR", (h["CORNERU"], h["CORNERV"]))):
        row = t[(np.abs(t["u_arcsec"] - u) < 1e-6) & (np.abs(t["v_arcsec"] - v) < 1e-6)][0]
        psf = psf_at_position(path, row["x_mosaic"], row["y_mosaic"])
        assert psf.sum() == pytest.approx(1.0, abs=1e-6)
        g = galsim.hsm.FindAdaptiveMom(galsim.Image(psf, scale=h["PIXSCALE"])).observed_shape.g
        assert g == pytest.approx(h[f"ELL{key}"], abs=2e-3), key
    with fits.open(path) as hl:
        mos, exp, psf = (hl[n].data.astype(float) for n in ("PSF_MOSAIC", "PSF_EXPOSURES", "PSF"))
    assert exp.shape[0] == sc.survey.n_exposures
    assert mos.sum() == pytest.approx(1.0, abs=1e-5) and np.abs(mos - psf).sum() > 1e-3
    np.testing.assert_allclose(mos, exp.mean(axis=0), atol=1e-6)
    assert (res.out_dir / "psf.png").read_bytes()[:4] == b"\x89PNG"


@pytest.mark.parametrize("key, value", [("telescope.field_psf.grid", "1"),
                                        ("telescope.field_psf.n_modes", "9"),
                                        ("telescope.field_psf.corner_astig_nm", "-5")])
def test_field_psf_config_validated(key, value):
    """Out-of-range field-PSF settings are refused naming the key (RULES)."""
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        make_scenario(f"{key}={value}")


def test_convolve_modes_equals_separate_convolutions():
    """The frequency-domain sum of convolve_modes equals image (x) mean + sum_k (image w_k)
    (x) mode_k done one by one with scipy.signal.fftconvolve (mode 'same'), to float32
    round-off, including tiles (tile=40 forces overlap-add across 4 x 4 tiles)."""
    rng = np.random.default_rng(5)
    img = np.zeros((150, 130), np.float32)
    img[rng.integers(0, 150, 60), rng.integers(0, 130, 60)] = rng.exponential(1.0, 60)
    yy, xx = np.mgrid[-6:7, -6:7]
    mean = np.exp(-(xx ** 2 + yy ** 2) / 8.0)
    mean /= mean.sum()
    modes = [mean * (xx ** 2 - yy ** 2) / 40.0, mean * xx * yy / 40.0]
    w = [rng.uniform(-1, 1, img.shape), rng.uniform(-1, 1, img.shape)]
    ref = signal.fftconvolve(img.astype(float), mean, mode="same")
    for m, wk in zip(modes, w):
        ref += signal.fftconvolve(img * wk.astype(np.float32), m, mode="same")
    out = convolve_modes(img, mean.astype(np.float32), [m.astype(np.float32) for m in modes],
                         w, tile=40)
    assert np.abs(out - ref).max() < 1e-6 * np.abs(ref).max()
