"""Optics: pupil raster and PSFs against diffraction theory and GalSim.

Comparison to other codes and published results:
- Born & Wolf, Principles of Optics (7th ed., 1999), sec. 8.5: Airy pattern
  I ~ [2 J1(x)/x]^2, x = pi D theta / lambda; first dark ring at x = j_{1,1} (1.21967 lambda/D);
  encircled energy 1 - J0(x)^2 - J1(x)^2 (83.8 % inside the first dark ring). Expected values
  are computed here with scipy.special, not copied.
- galsim.Airy (GalSim 2.x) as the reference implementation of the (obscured) Airy profile and of
  its convolution with a pixel and a Gaussian.
- Fraunhofer theory (Parseval): peak intensity / total flux = A_pupil / lambda^2 per steradian.
- Mahajan 1986, JOSA A 3, 470: a central obscuration eps lowers the peak per unit flux by
  (1 - eps^2).
- Marechal approximation, Strehl ~ exp(-(2 pi sigma / lambda)^2) [mem].
- Spike directions (common practice): a straight strut throws spikes perpendicular to itself; N
  equally spaced radial struts give N spikes for even N, 2N for odd N; hexagonal segments throw
  six spikes along their edge normals.
Pupils are small rasters (64-256 cells) to keep the file fast.
"""

import dataclasses

import galsim
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize, special

from simfield.bands import make_band
from simfield.config import PSFConfig, PupilConfig, TelescopeConfig
from simfield.errors import ConfigError
from simfield.optics import (band_psf, cached_band_psf, effective_psf, make_pupil,
                             cached_psf_png, monochromatic_psf, scenario_pupil, write_psf_png)
from simfield.optics import psf as psf_module

RAD_PER_ARCSEC = np.pi / 180 / 3600


def circular(d=6.0, eps=0.0, struts=0, angles=(), width=0.05, grid=256, **psf):
    """A circular telescope of diameter d (m), obstruction eps * d, radial struts."""
    return TelescopeConfig(
        name="test", diameter_m=d, collecting_area_m2=np.pi / 4 * d**2,
        pupil=PupilConfig(kind="circular", obstruction_diameter_m=eps * d, strut_count=struts,
                          strut_angles_deg=list(angles), strut_width_m=width, grid_size=grid),
        psf=PSFConfig(**psf))


def segmented(rings=2, hole=False, grid=256, **pupil):
    """A segmented telescope without obstruction or struts unless given."""
    return TelescopeConfig(
        name="test", diameter_m=6.0, collecting_area_m2=20.0,
        pupil=PupilConfig(kind="segmented", segment_rings=rings, central_hole=hole,
                          segment_flat_m=0.85, gap_m=0.01, obstruction_diameter_m=0.0,
                          strut_count=0, grid_size=grid, **pupil))


def lam_over_d_arcsec(lam_nm, d_m):
    return lam_nm * 1e-9 / d_m / RAD_PER_ARCSEC


def airy_intensity(x):
    """[2 J1(x)/x]^2 (Born & Wolf sec. 8.5)."""
    x = np.where(x == 0, 1e-12, x)
    return (2 * special.j1(x) / x) ** 2


def central_cut(img):
    c = img.shape[0] // 2
    return img[c, c:]


def poly_psf(pupil, lams, scale, npix):
    """Sum of monochromatic PSFs (smooths the speckle of one wavelength)."""
    return sum(monochromatic_psf(pupil, lam, scale, npix) for lam in lams)


def spike_angles(img, r1_pix, r2_pix, nbins=360, contrast=3.0, window_deg=12):
    """Azimuths (deg, 0..360 from +x = columns, counter-clockwise to +y = rows) of the peaks of
    the annulus-averaged angular profile: maxima within +-window_deg that stand ``contrast``
    times above the profile's median. Returns (angles, profile, median)."""
    n = img.shape[0]
    y, x = np.mgrid[0:n, 0:n] - (n - 1) / 2
    r = np.hypot(x, y)
    m = (r >= r1_pix) & (r <= r2_pix)
    az = np.mod(np.degrees(np.arctan2(y[m], x[m])), 360)
    k = np.minimum((az / (360 / nbins)).astype(int), nbins - 1)
    prof = np.bincount(k, weights=img[m], minlength=nbins) / np.bincount(k, minlength=nbins)
    med = np.median(prof)
    w = int(window_deg * nbins / 360)
    ext = np.concatenate([prof[-w:], prof, prof[:w]])
    local_max = np.array([prof[i] == ext[i:i + 2 * w + 1].max() for i in range(nbins)])
    peaks = np.flatnonzero(local_max & (prof > contrast * med))
    return (peaks + 0.5) * (360 / nbins), prof, med


def angle_set_close(found, expected, tol_deg):
    """Every expected angle has one found angle within tol and the counts agree."""
    found, expected = np.sort(found), np.sort(np.mod(expected, 360))
    assert found.size == expected.size, (found, expected)
    d = np.abs((found[:, None] - expected[None, :] + 180) % 360 - 180)
    assert np.all(d.min(axis=0) <= tol_deg), (found, expected)


# --------------------------------------------------------------------------------------------
# Airy pattern (Born & Wolf sec. 8.5; galsim.Airy)
# --------------------------------------------------------------------------------------------
LAM = 2000.0  # nm
D = 6.0  # m


@pytest.fixture(scope="module")
def airy_pupil():
    return make_pupil(circular(D, grid=256))


def test_pupil_area_circle(airy_pupil):
    """Anti-aliased raster area of a 6 m disc equals pi D^2 / 4 to 1e-3 (geometry)."""
    assert_allclose(airy_pupil.area_m2, np.pi / 4 * D**2, rtol=1e-3)


def test_airy_first_dark_ring(airy_pupil):
    """First minimum at j_{1,1}/pi = 1.21967 lambda/D (Born & Wolf sec. 8.5), to 0.1 %."""
    ld = lam_over_d_arcsec(LAM, D)
    img = monochromatic_psf(airy_pupil, LAM, ld / 50, 161)
    cut = central_cut(img)
    i = int(np.argmin(cut[40:80])) + 40
    # parabola through the three samples around the minimum
    a, b, c = cut[i - 1], cut[i], cut[i + 1]
    x_min = (i + 0.5 * (a - c) / (a - 2 * b + c)) / 50
    expected = special.jn_zeros(1, 1)[0] / np.pi
    assert_allclose(expected, 1.21967, rtol=1e-5)
    assert_allclose(x_min, expected, rtol=1e-3)


def test_airy_fwhm(airy_pupil):
    """FWHM = 1.029 lambda/D (Born & Wolf sec. 8.5; root of [2J1(x)/x]^2 = 1/2), to 0.1 %."""
    ld = lam_over_d_arcsec(LAM, D)
    img = monochromatic_psf(airy_pupil, LAM, ld / 100, 141)
    cut = central_cut(img) / img.max()
    i = int(np.argmax(cut < 0.5))
    x_half = (i - 1 + (cut[i - 1] - 0.5) / (cut[i - 1] - cut[i])) / 100
    x_ref = optimize.brentq(lambda x: airy_intensity(x) - 0.5, 0.5, 3.0)
    assert_allclose(2 * x_ref / np.pi, 1.029, rtol=1e-3)
    assert_allclose(2 * x_half, 2 * x_ref / np.pi, rtol=1e-3)


def test_airy_encircled_energy_first_dark_ring(airy_pupil):
    """EE inside the first dark ring = 1 - J0^2 - J1^2 = 0.838 (Born & Wolf sec. 8.5), to
    0.1 %."""
    ld = lam_over_d_arcsec(LAM, D)
    img = monochromatic_psf(airy_pupil, LAM, ld / 20, 81)
    n = img.shape[0]
    y, x = np.mgrid[0:n, 0:n] - (n - 1) / 2
    x1 = special.jn_zeros(1, 1)[0]
    ee = img[np.hypot(x, y) / 20 <= x1 / np.pi].sum()  # samples are fractions of total flux
    expected = 1 - special.j0(x1) ** 2 - special.j1(x1) ** 2
    assert_allclose(expected, 0.838, atol=5e-4)
    assert_allclose(ee, expected, rtol=1e-3)


@pytest.mark.parametrize("eps", [0.0, 0.3])
def test_airy_profile_matches_galsim(eps):
    """Sampled PSF equals galsim.Airy(lam_over_diam, obscuration) surface brightness x sample
    area, to 1e-4 of the peak (reference library)."""
    tel = circular(D, eps=eps, grid=256)
    pupil = make_pupil(tel)
    ld = lam_over_d_arcsec(LAM, D)
    scale, n = ld / 4, 41
    img = monochromatic_psf(pupil, LAM, scale, n)
    x = (np.arange(n) - (n - 1) / 2) * scale
    xx, yy = np.meshgrid(x, x)
    ref = galsim.Airy(lam_over_diam=ld, obscuration=eps)
    expect = np.vectorize(lambda a, b: ref.xValue(a, b))(xx, yy) * scale**2
    assert_allclose(img, expect, rtol=0, atol=1e-4 * expect.max())


def test_obstruction_lowers_peak_by_one_minus_eps_squared():
    """Peak per unit flux of an annulus / clear disc = 1 - eps^2 (Mahajan 1986, JOSA A 3, 470),
    to 0.1 %."""
    ld = lam_over_d_arcsec(LAM, D)
    peaks = []
    for eps in (0.0, 0.4):
        img = monochromatic_psf(make_pupil(circular(D, eps=eps, grid=192)), LAM, ld / 10, 3)
        peaks.append(img[1, 1])
    assert_allclose(peaks[1] / peaks[0], 1 - 0.4**2, rtol=1e-3)


# --------------------------------------------------------------------------------------------
# any pupil: Parseval, lambda scaling, wavefront error
# --------------------------------------------------------------------------------------------
def test_segmented_area_and_peak_over_flux():
    """Clear area = 19 hexagons (sqrt3/2) f^2 to 5e-4 (geometry), and peak intensity / total
    flux = A / lambda^2 per steradian to 5e-4 with A from geometry (Fraunhofer theory)."""
    pupil = make_pupil(segmented(rings=2, hole=False, grid=200))
    area = 19 * np.sqrt(3) / 2 * 0.85**2
    assert_allclose(pupil.area_m2, area, rtol=5e-4)
    lam = 1500.0
    scale = 0.002  # arcsec: the central sample ~ the peak
    img = monochromatic_psf(pupil, lam, scale, 3)
    peak_per_sr = img[1, 1] / (scale * RAD_PER_ARCSEC) ** 2
    assert_allclose(peak_per_sr, area / (lam * 1e-9) ** 2, rtol=5e-4)


def test_psf_width_scales_with_wavelength():
    """Aberration-free pupil: FWHM(2 lambda) / FWHM(lambda) = 2 on a fixed angular grid
    (Fraunhofer scaling theta ~ lambda / D), to 0.5 %."""
    pupil = make_pupil(segmented(rings=2, hole=True, grid=128))
    widths = []
    for lam in (1000.0, 2000.0):
        img = monochromatic_psf(pupil, lam, 0.001, 201)
        cut = central_cut(img) / img.max()
        i = int(np.argmax(cut < 0.5))
        widths.append(i - 1 + (cut[i - 1] - 0.5) / (cut[i - 1] - cut[i]))
    assert_allclose(widths[1] / widths[0], 2.0, rtol=5e-3)


@pytest.mark.parametrize("lam", [1200.0, 2500.0])
def test_marechal_strehl(lam):
    """Small per-segment and Zernike wavefront error: on-axis Strehl = exp(-(2 pi sigma/lambda)^2)
    (Marechal [mem]) to 1 % (the approximation's own error at sigma/lambda < 0.04), sigma the
    area-weighted rms of the raster OPD."""
    tel = segmented(rings=2, hole=True, grid=128, segment_wfe_rms_nm=40.0,
                    zernike_rms_nm=[30.0, 20.0, 20.0])
    pupil = make_pupil(tel, np.random.default_rng(5))
    perfect = make_pupil(tel)
    a = pupil.amplitude
    mean = (a * pupil.opd_nm).sum() / a.sum()
    sigma = np.sqrt((a * (pupil.opd_nm - mean) ** 2).sum() / a.sum())
    assert 20 < sigma < 100
    s = (monochromatic_psf(pupil, lam, 0.01, 1)[0, 0]
         / monochromatic_psf(perfect, lam, 0.01, 1)[0, 0])
    assert_allclose(s, np.exp(-(2 * np.pi * sigma / lam) ** 2), rtol=1e-2)


def test_default_telescope_wavefront_budget(scenario_factory):
    """The default Lantern wavefront: its drawn rms sigma is the practitioner's budget for a
    telescope diffraction-limited near 2 um (Marechal Strehl ~0.8 at 2 um, Born & Wolf sec. 9.1;
    common practice), the net tilt removed; the band PSFs' Strehl is below 1 in every band,
    rising to the red, and within 0.03 of exp(-(2 pi sigma / lambda_pivot)^2) (Marechal [mem];
    polychromatic, so not exact); lantern_ideal keeps Strehl 1."""
    from simfield.pipeline import make_bands

    sc = scenario_factory()
    pupil = scenario_pupil(sc.telescope, sc.seed)
    sigma = pupil.rms_wfe_nm
    assert 0.7 < np.exp(-(2 * np.pi * sigma / 2000.0) ** 2) < 0.9, sigma
    a, (y, x) = pupil.amplitude, np.meshgrid(pupil.coords_m, pupil.coords_m, indexing="ij")
    for c in (x, y):  # no net tilt: the OPD is orthogonal to x and y over the clear area
        assert abs((a * pupil.opd_nm * c).sum() / np.sqrt((a * c * c).sum() * a.sum())) < 1e-6
    strehl = []
    for b in make_bands(sc):
        p = band_psf(sc.telescope, b, 0.02, 0.1, seed=sc.seed, pixel_integrated=False)
        assert p.strehl == pytest.approx(np.exp(-(2 * np.pi * sigma / b.pivot_nm) ** 2), abs=0.03)
        strehl.append(p.strehl)
    assert np.all(np.diff(strehl) > 0) and strehl[-1] < 1, strehl
    ideal = scenario_factory("telescope=lantern_ideal")
    assert band_psf(ideal.telescope, make_bands(ideal)[0], 0.02, 0.1, seed=1).strehl == 1.0


def test_wavefront_error_is_seeded():
    """Same generator seed -> identical OPD; another seed -> a different one (RULES)."""
    tel = segmented(rings=1, grid=64, segment_wfe_rms_nm=30.0, zernike_rms_nm=[10.0])
    a = make_pupil(tel, np.random.default_rng(1)).opd_nm
    b = make_pupil(tel, np.random.default_rng(1)).opd_nm
    c = make_pupil(tel, np.random.default_rng(2)).opd_nm
    assert np.array_equal(a, b)
    assert not np.allclose(a, c)


# --------------------------------------------------------------------------------------------
# diffraction spikes (common practice)
# --------------------------------------------------------------------------------------------
def test_hexagonal_segments_give_six_spikes_along_edge_normals():
    """Hexagonal segments alone: six spikes along the edge normals 30 + 60 k deg (common
    practice), to 2 deg."""
    pupil = make_pupil(segmented(rings=2, hole=False, grid=160))
    img = poly_psf(pupil, [1800.0, 2000.0, 2200.0], 0.02, 301)
    found, _, _ = spike_angles(img, 60, 150)
    angle_set_close(found, 30 + 60 * np.arange(6), 2.0)


@pytest.mark.parametrize("n_struts", [3, 4, 5, 6])
def test_radial_struts_spike_count(n_struts):
    """N equally spaced radial struts: N spikes for even N, 2N for odd N, perpendicular to the
    struts (common practice), to 2 deg."""
    angles = 90 + 360 * np.arange(n_struts) / n_struts
    tel = circular(D, eps=0.1, struts=n_struts, angles=angles, width=0.15, grid=128)
    img = poly_psf(make_pupil(tel), [1800.0, 2000.0, 2200.0], 0.02, 301)
    found, _, _ = spike_angles(img, 60, 150)
    expected = np.unique(np.round(np.mod(np.concatenate([angles + 90, angles + 270]), 360), 6))
    assert expected.size == (n_struts if n_struts % 2 == 0 else 2 * n_struts)
    angle_set_close(found, expected, 2.0)


def test_three_strut_preset_six_plus_six(scenario_factory):
    """conf telescope=three_struts: three struts 120 deg apart at 100, 220, 340 deg. Expected
    spikes (common practice): six along the hexagon-edge normals 30 + 60 k deg, and a pair
    perpendicular to each strut, a +- 90 deg = 10 + 60 k deg (odd N = 3 -> 2N = 6, none on a
    segment spike, each 20 deg from the nearest). Found to 2 deg, twelve in all, the strut
    spikes fainter than the segment-edge ones, and nothing at 0 / 180 deg, the pair a strut at
    90 deg would throw."""
    struts = np.array([100.0, 220.0, 340.0])
    tel = scenario_factory("telescope=three_struts").telescope
    assert tel.pupil.strut_count == 3
    assert_allclose(tel.pupil.strut_angles_deg, struts)
    hexagon = np.mod(30.0 + 60.0 * np.arange(6), 360)
    strut_spikes = np.unique(np.mod(np.concatenate([struts + 90, struts - 90]), 360))
    assert strut_spikes.size == 6
    sep = np.abs((strut_spikes[:, None] - hexagon[None, :] + 180) % 360 - 180).min(axis=1)
    assert_allclose(sep, 20.0)
    img = poly_psf(make_pupil(tel, grid_size=256), np.linspace(1800, 2200, 5), 0.02, 341)
    found, prof, med = spike_angles(img, 100, 165)
    angle_set_close(found, np.concatenate([hexagon, strut_spikes]), 2.0)
    level = prof[(found // 1).astype(int)]
    d_strut = np.abs((found[:, None] - strut_spikes[None, :] + 180) % 360 - 180).min(axis=1)
    is_strut = d_strut <= 2.0
    assert is_strut.sum() == 6 and level[is_strut].max() < level[~is_strut].min()
    assert level[is_strut].min() > 4 * med  # well above the detection contrast (3)
    off = np.abs((np.arange(360) + 0.5 + 90) % 180 - 90) <= 3  # bins within 3 deg of 0 / 180
    assert prof[off].max() < 1.5 * med


# --------------------------------------------------------------------------------------------
# band PSF
# --------------------------------------------------------------------------------------------
def narrow_band(center=LAM):
    return make_band("t", center, 2.0, 0.5)


@pytest.mark.parametrize("scale_lod", [0.25, 0.8])
def test_band_psf_pixel_integration_matches_galsim(scale_lod):
    """Nearly monochromatic band PSF with jitter = galsim.Convolve(Airy, Gaussian) drawn with
    its pixel (reference library), to 5e-4 of the peak (GalSim's FFT accuracy); covers
    oversample raised to Nyquist."""
    ld = lam_over_d_arcsec(LAM, D)
    scale = scale_lod * ld
    tel = circular(D, grid=128, n_wavelengths=1, jitter_mas=0.3 * ld * 1000)
    p = band_psf(tel, narrow_band(), scale, 12 * ld)
    n = p.image.shape[0]
    ref = galsim.Convolve(galsim.Airy(lam_over_diam=ld), galsim.Gaussian(sigma=0.3 * ld))
    expect = ref.drawImage(nx=n, ny=n, scale=scale, method="auto").array
    expect /= expect.sum()
    assert_allclose(p.image, expect, rtol=0, atol=5e-4 * expect.max())


@pytest.mark.parametrize("scale_lod", [0.25, 0.8])
def test_band_psf_sampled_matches_galsim_no_pixel(scale_lod):
    """pixel_integrated=False: the jittered Airy sampled at pixel centres, as GalSim draws it
    with method='no_pixel' (reference library), to 5e-4 of the peak."""
    ld = lam_over_d_arcsec(LAM, D)
    scale = scale_lod * ld
    tel = circular(D, grid=128, n_wavelengths=1, jitter_mas=0.3 * ld * 1000)
    p = band_psf(tel, narrow_band(), scale, 12 * ld, pixel_integrated=False)
    n = p.image.shape[0]
    ref = galsim.Convolve(galsim.Airy(lam_over_diam=ld), galsim.Gaussian(sigma=0.3 * ld))
    expect = ref.drawImage(nx=n, ny=n, scale=scale, method="no_pixel").array
    expect /= expect.sum()
    assert_allclose(p.image, expect, rtol=0, atol=5e-4 * expect.max())


def test_band_psf_stamp_properties():
    """Odd size, sum 1, centred, float64, sensible FWHM / EE; same seed identical (RULES)."""
    tel = segmented(rings=1, grid=64, segment_wfe_rms_nm=20.0)
    tel.psf = PSFConfig(n_wavelengths=3)
    band = make_band("b", 1500.0, 300.0, 0.4)
    p = band_psf(tel, band, 0.03, 0.6, seed=3)
    n = p.image.shape[0]
    assert n == 2 * 20 + 1 and p.image.dtype == np.float64
    assert_allclose(p.image.sum(), 1.0, rtol=1e-12)
    y, x = np.mgrid[0:n, 0:n] - (n - 1) / 2
    assert abs((p.image * x).sum()) < 0.05 and abs((p.image * y).sum()) < 0.05
    assert p.band == "b" and p.pivot_nm == pytest.approx(band.pivot_nm)
    assert 0 < p.strehl < 1 and 0 < p.flux_fraction < 1
    assert np.all(np.diff(p.ee_values) >= -1e-12) and p.ee_values[-1] <= 1 + 1e-12
    # D ~ 2.4 m, lambda ~ 1.5 um: lambda/D ~ 0.13 arcsec, FWHM ~ 1.03 lambda/D plus pixels
    assert 0.1 < p.fwhm_arcsec < 0.25
    q = band_psf(tel, band, 0.03, 0.6, seed=3)
    assert np.array_equal(p.image, q.image)
    assert not np.array_equal(p.image, band_psf(tel, band, 0.03, 0.6, seed=4).image)


def test_band_psf_strehl_uses_scenario_pupil():
    """Narrow-band PSFImage.strehl = exp(-(2 pi sigma/lambda)^2) (Marechal [mem]) to 1 %, sigma
    the rms of scenario_pupil(tel, seed): the PSF and the pictured pupil share one draw."""
    tel = segmented(rings=1, grid=64, segment_wfe_rms_nm=40.0)
    tel.psf = PSFConfig(n_wavelengths=1)
    p = band_psf(tel, narrow_band(1500.0), 0.05, 0.3, seed=7)
    sigma = scenario_pupil(tel, 7).rms_wfe_nm
    assert sigma > 10
    assert_allclose(p.strehl, np.exp(-(2 * np.pi * sigma / 1500.0) ** 2), rtol=1e-2)


def test_effective_psf_matches_galsim_box():
    """Scene PSF convolved with a 2-scene-pixel detector pixel = galsim.Airy convolved with
    that box and drawn with the scene pixel (reference library), to 5e-4 of the peak; FWHM
    grows."""
    ld = lam_over_d_arcsec(LAM, D)
    scale = 0.25 * ld
    tel = circular(D, grid=128, n_wavelengths=1, jitter_mas=0.0)
    p = band_psf(tel, narrow_band(), scale, 10 * ld)
    e = effective_psf(p, 2 * scale)
    n = p.image.shape[0]
    ref = galsim.Convolve(galsim.Airy(lam_over_diam=ld), galsim.Pixel(2 * scale))
    # method "fft" adds galsim's own scene-pixel convolution on top of the detector box
    expect = ref.drawImage(nx=n, ny=n, scale=scale, method="fft").array
    expect /= expect.sum()
    assert_allclose(e.image, expect, rtol=0, atol=5e-4 * expect.max())
    assert e.fwhm_arcsec > p.fwhm_arcsec


def test_band_psf_rejects_bad_radius():
    """A radius below one pixel is refused naming the key (RULES)."""
    with pytest.raises(ConfigError, match="radius_arcsec"):
        band_psf(circular(grid=64), narrow_band(), 0.02, 0.01)


@pytest.mark.parametrize("key, value", [("telescope.pupil.grid_size", "10"),
                                        ("telescope.psf.reference_beta", "50"),
                                        ("telescope.pupil.strut_offset_m", "9")])
def test_optics_config_validated(scenario_factory, key, value):
    """Out-of-range pupil / PSF settings are refused naming the key (RULES)."""
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        scenario_factory(f"{key}={value}")


def test_cache_second_call_is_a_hit(tmp_path, monkeypatch):
    """The second identical request is read from disk (band_psf not called again); a new seed
    or band throughput misses."""
    calls = []
    real = psf_module.band_psf

    def counting(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(psf_module, "band_psf", counting)
    tel = circular(grid=64, n_wavelengths=2)
    band = make_band("c", 1500.0, 200.0, 0.4)
    a = cached_band_psf(tel, band, 0.04, 0.4, seed=0, cache_dir=tmp_path)
    b = cached_band_psf(tel, band, 0.04, 0.4, seed=0, cache_dir=tmp_path)
    assert len(calls) == 1 and not a.from_cache and b.from_cache
    assert np.array_equal(a.image, b.image) and b.fwhm_arcsec == a.fwhm_arcsec
    assert not list(tmp_path.glob("*.tmp"))
    cached_band_psf(tel, band, 0.04, 0.4, seed=1, cache_dir=tmp_path)
    band2 = dataclasses.replace(band, throughput=band.throughput * 0.9)
    cached_band_psf(tel, band2, 0.04, 0.4, seed=0, cache_dir=tmp_path)
    assert len(calls) == 3


def test_write_psf_png(tmp_path):
    """The picture is a PNG file (signature bytes)."""
    tel = circular(grid=64, n_wavelengths=1)
    p = band_psf(tel, narrow_band(), 0.05, 0.5)
    out = write_psf_png([p], make_pupil(tel), tmp_path / "psf.png")
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_cached_psf_png_draws_once_per_content(tmp_path, monkeypatch):
    """The cached picture has the bytes write_psf_png gives for the same PSFs and pupil; a
    second run copies it without drawing; other PSF values make another picture; no
    temporary file is left."""
    tel = circular(grid=64, n_wavelengths=1)
    p = band_psf(tel, narrow_band(), 0.05, 0.5)
    ref = write_psf_png([p], scenario_pupil(tel, 4, grid_size=64), tmp_path / "ref.png", seed=4)
    out = cached_psf_png(tel, [p], 4, tmp_path / "run1" / "psf.png", tmp_path / "cache",
                         pupil_grid=64)
    assert out.read_bytes() == ref.read_bytes()
    drawn = []
    real = psf_module.write_psf_png
    monkeypatch.setattr(psf_module, "write_psf_png",
                        lambda *a, **k: drawn.append(1) or real(*a, **k))
    again = cached_psf_png(tel, [p], 4, tmp_path / "run2" / "psf.png", tmp_path / "cache",
                           pupil_grid=64)
    assert again.read_bytes() == ref.read_bytes() and not drawn
    q = dataclasses.replace(p, image=p.image * 0.5)
    cached_psf_png(tel, [q], 4, tmp_path / "run3" / "psf.png", tmp_path / "cache",
                   pupil_grid=64)
    assert drawn == [1] and len(list((tmp_path / "cache").glob("*.png"))) == 2
    assert not list(tmp_path.rglob("*.part"))

