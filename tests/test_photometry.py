"""Forced multi-band photometry (simfield.photometry): matching kernels, aperture corrections,
errors of correlated pixels, the written catalogue and its configuration.

Comparison to other codes and formulas:
- Gaussian convolution adds variances, so the kernel matching a Gaussian PSF of sigma_b to one
  of sigma_t is a Gaussian of sigma_k^2 = sigma_t^2 - sigma_b^2 (common practice; the
  Fourier transform of a Gaussian is a Gaussian).
- The encircled energy of a circular Gaussian is 1 - exp(-r^2 / 2 sigma^2) (common practice);
  pixel-integrated point sources are drawn with scipy.special.erf.
- A source of flat f_nu has AB colour 0 in any pair of bands (Oke & Gunn 1983, ApJ 266, 713:
  m_AB = -2.5 log10 f_nu - 48.60, independent of the band).
- Errors are compared with the scatter of photutils apertures in empty sky of the written
  files (scipy.signal.fftconvolve for the matched image), as tests/test_noise.py does.
"""

import re

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from photutils.aperture import CircularAperture, aperture_photometry
from scipy import ndimage, signal, special

from simfield.errors import ConfigError
from simfield.photometry import matching_kernel, measure_catalog, read_psf
from simfield.pipeline import run_scenario
from tests.conftest import make_scenario

PSF_PIX = 0.02  # arcsec, the PSF files' pixel
MOS_PIX = 0.04  # arcsec, the mosaic pixel
FLUXNJY = 30.0  # nJy per e-/s of the synthetic mosaics


def _gauss(sigma, pix, n):
    """Unit-sum circular Gaussian of ``sigma`` (arcsec) sampled on n x n pixels of ``pix``."""
    yy, xx = (np.indices((n, n)) - n // 2) * pix
    g = np.exp(-(xx**2 + yy**2) / (2 * sigma**2))
    return g / g.sum()


# ------------------------------------------------------------------------- matching kernel
@pytest.mark.parametrize("sigma_b,sigma_t", [(0.03, 0.06), (0.05, 0.08)])
def test_gaussian_kernel_is_the_analytic_gaussian(sigma_b, sigma_t):
    """The kernel between two Gaussians (photutils' matching kernel resampled to the mosaic
    pixel) is the Gaussian of sigma_t^2 - sigma_b^2 (common practice) to 1% of its peak, and
    its second moment gives that variance to 1%."""
    k = matching_kernel(_gauss(sigma_b, PSF_PIX, 151), _gauss(sigma_t, PSF_PIX, 151),
                        PSF_PIX, MOS_PIX)
    sk2 = sigma_t**2 - sigma_b**2
    ref = _gauss(np.sqrt(sk2), MOS_PIX, k.shape[0])
    assert np.abs(k - ref).max() < 0.01 * ref.max()
    yy, xx = (np.indices(k.shape) - k.shape[0] // 2) * MOS_PIX
    assert np.sum(k * (xx**2 + yy**2)) / 2 == pytest.approx(sk2, rel=0.01)
    # and it turns the band's PSF into the target's on the mosaic pixel (scipy convolution)
    b = _gauss(sigma_b, MOS_PIX, 75)
    t = _gauss(sigma_t, MOS_PIX, 75)
    assert np.abs(signal.fftconvolve(b, k, mode="same") - t).max() < 0.01 * t.max()


# ------------------------------------------------------------------------- synthetic mosaics
SIGMAS = {"ba": 0.03, "bb": 0.05, "bc": 0.08}  # arcsec; bc is the broadest
RADIUS = 0.15  # arcsec: EE 0.83 in bc, 0.99 in ba, so the two corrections differ
NPIX = 300


def _pixel_integrated(x0, y0, sigma, shape):
    """A unit-flux Gaussian point source at (x0, y0) (pix) integrated over each pixel (erf)."""
    s = sigma / MOS_PIX * np.sqrt(2)
    ex = np.diff(special.erf((np.arange(shape[1] + 1) - 0.5 - x0) / s)) / 2
    ey = np.diff(special.erf((np.arange(shape[0] + 1) - 0.5 - y0) / s)) / 2
    return np.outer(ey, ex)


def _write_band(folder, band, image, invvar, rho=None):
    """mosaic_<band>.fits and psf_<band>.fits as a run writes them, made with astropy alone."""
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 2.0]
    w.wcs.crpix = [NPIX / 2 + 0.5] * 2
    w.wcs.cdelt = [-MOS_PIX / 3600, MOS_PIX / 3600]
    h = w.to_header()
    h["FLUXNJY"] = FLUXNJY
    rho = np.pad([[1.0]], 2) if rho is None else rho
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(image.astype(np.float32), h, name="IMAGE"),
                  fits.ImageHDU(invvar.astype(np.float32), h, name="INVVAR"),
                  fits.ImageHDU(np.zeros(image.shape, np.int32), h, name="FLAGS"),
                  fits.ImageHDU(rho.astype(np.float32), name="NOISECOR")]
                 ).writeto(folder / f"mosaic_{band}.fits")
    sig = SIGMAS[band]
    ph = fits.Header({"PIXSCALE": PSF_PIX, "FWHM": 2.3548 * sig})
    r = np.linspace(0.01, 1.5, 150)
    ee = Table({"radius": r, "ee": 1 - np.exp(-r**2 / (2 * sig**2))})  # Gaussian EE
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(_gauss(sig, PSF_PIX, 151), ph, name="PSF_DET"),
                  fits.table_to_hdu(ee)]).writeto(folder / f"psf_{band}.fits")
    fits.setval(folder / f"psf_{band}.fits", "EXTNAME", value="EE", ext=2)


def _sources(n=12, seed=4):
    rng = np.random.default_rng(seed)
    g = np.linspace(30, NPIX - 30, 4)
    x, y = np.meshgrid(g, g[:3])
    x, y = x.ravel()[:n] + rng.uniform(-0.5, 0.5, n), y.ravel()[:n] + rng.uniform(-0.5, 0.5, n)
    return Table({"id": np.arange(1, n + 1), "x": x, "y": y, "ra": np.zeros(n),
                  "dec": np.zeros(n)})


def _synthetic(folder, flux_njy, noise_sigma=0.0, seed=5):
    """Point sources of ``flux_njy`` (nJy, per band) on mosaics of each band; returns the
    detections table, mosaics and PSFs."""
    det = _sources()
    rng = np.random.default_rng(seed)
    for band, sig in SIGMAS.items():
        img = sum(flux_njy[band] / FLUXNJY * _pixel_integrated(x, y, sig, (NPIX, NPIX))
                  for x, y in zip(det["x"], det["y"]))
        var = max(noise_sigma, 1e-3) ** 2
        img = img + (rng.normal(0, noise_sigma, img.shape) if noise_sigma else 0)
        _write_band(folder, band, img, np.full(img.shape, 1 / var))
    mosaics = {b: folder / f"mosaic_{b}.fits" for b in SIGMAS}
    psfs = {b: read_psf(folder / f"psf_{b}.fits") for b in SIGMAS}
    return det, mosaics, psfs


def test_point_source_comes_back_at_its_flux_in_every_band(tmp_path):
    """Noiseless point sources of known flux come back, native and PSF-matched, within 1% in
    every band after the aperture correction (Gaussian EE, common practice; the mosaic pixel's
    blur added as in simfield.photometry.encircled). Tolerance: sub-pixel phase scatters the
    sums by ~0.2%; without the pixel's blur the matched fluxes come out 1.5% low here."""
    flux = {"ba": 100.0, "bb": 250.0, "bc": 40.0}
    det, mosaics, psfs = _synthetic(tmp_path, flux)
    t = measure_catalog(det, mosaics, psfs, RADIUS)
    assert t.meta["MATCHTO"] == "bc"  # the broadest PSF
    for b, f in flux.items():
        np.testing.assert_allclose(t[f"flux_native_{b}"], f, rtol=0.01)
        np.testing.assert_allclose(t[f"flux_{b}"], f, rtol=0.01)
    # the correction matters: uncorrected matched apertures would be ~17% low
    assert psfs["bc"].encircled(RADIUS) < 0.85


def test_narrower_target_refused(tmp_path):
    """Matching to a PSF narrower than another band's would deconvolve: refused, naming the
    key, the value and the broader bands, before anything is measured."""
    det, mosaics, psfs = _synthetic(tmp_path, {b: 10.0 for b in SIGMAS})
    with pytest.raises(ConfigError, match=r"photometry\.match_to='bb' .*narrower.*bc"):
        measure_catalog(det, mosaics, psfs, RADIUS, match_to="bb")


def test_blocks_do_not_change_the_result(tmp_path):
    """Internal regression (DEVELOPERS.md: nothing reported depends on how the work is cut):
    blocks of 64 pixels, with sources on their edges, give what one block gives."""
    det, mosaics, psfs = _synthetic(tmp_path, {"ba": 50.0, "bb": 50.0, "bc": 50.0})
    det["x"][:3] = [63.5, 64.0, 127.6]
    small = measure_catalog(det, mosaics, psfs, RADIUS, block=64)
    whole = measure_catalog(det, mosaics, psfs, RADIUS, block=NPIX)
    for c in small.colnames:
        np.testing.assert_allclose(small[c], whole[c], rtol=1e-6, atol=1e-9)


def test_flat_fnu_source_has_zero_colour(tmp_path):
    """A flat-f_nu source (the same nJy in every band) has PSF-matched colours 0 within 3
    sigma of the stated errors (Oke & Gunn 1983: AB colour of flat f_nu is 0)."""
    det, mosaics, psfs = _synthetic(tmp_path, {b: 400.0 for b in SIGMAS}, noise_sigma=0.02)
    t = measure_catalog(det, mosaics, psfs, RADIUS)
    ft, et = np.asarray(t["flux_bc"]), np.asarray(t["flux_err_bc"])
    for b in ("ba", "bb"):
        f, e = np.asarray(t[f"flux_{b}"]), np.asarray(t[f"flux_err_{b}"])
        colour = -2.5 * np.log10(f / ft)
        err = 2.5 / np.log(10) * np.hypot(e / f, et / ft)
        assert np.all(np.abs(colour) < 3 * err), (b, colour, err)
        assert np.all(err < 0.05)  # a real test: S/N ~ 40-60 per band


# ------------------------------------------------------------------------- a real run
RUN_BANDS = ("b10", "b23", "b36")


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("phot")
    # the perfect telescope: these checks are about errors and matching, not the wavefront
    sc = make_scenario("survey=quick", "survey.width_arcsec=24", "survey.height_arcsec=24",
                       "survey.n_exposures=4", "score.enabled=false", "telescope=lantern_ideal",
                       "telescope.psf.spike_radius_arcsec=2.0", "selection.report=false")
    sc.telescope.bands = [b for b in sc.telescope.bands if b.name in RUN_BANDS]
    res = run_scenario(sc, tmp / "run")
    return sc, res


def test_file_columns_units_and_header(run):
    """photometry.fits: one row per detection, the documented columns with units (nJy),
    descriptions, DETBAND / MATCHTO / APER_AS, provenance."""
    sc, res = run
    out = res.out_dir
    det = Table.read(out / "detections_b36.fits", hdu="DETECTIONS")
    with fits.open(out / "photometry.fits") as hl:
        hl.verify("exception")
        h = hl["PHOTOMETRY"].header
        assert hl[0].header["SIMFSEED"] == sc.seed
        assert (h["DETBAND"], h["MATCHTO"], h["APER_AS"]) == ("b36", "b36", 0.2)
    t = Table.read(out / "photometry.fits", hdu="PHOTOMETRY")
    assert len(t) == len(det) > 10 and list(t["id"]) == list(det["id"])
    assert list(t.colnames[:5]) == ["id", "ra", "dec", "x", "y"]
    assert str(t["ra"].unit) == "deg" and str(t["x"].unit) == "pix"
    for b in RUN_BANDS:
        for c in (f"flux_{b}", f"flux_err_{b}", f"flux_native_{b}", f"flux_native_err_{b}"):
            assert str(t[c].unit) == "nJy" and t[c].description.count(b) >= 1, c
        assert t[f"flux_native_err_{b}"].description.startswith("1-sigma error of flux_native")
        assert t[f"flags_{b}"].dtype.kind == "i"
        assert np.all(t[f"flux_err_{b}"] > 0)
    assert res.summary["photometry"]["n_rows"] == len(t)
    assert "photometry" in res.timings
    # the native sums are photutils' aperture sums on IMAGE at the detections, times one
    # correction FLUXNJY / EE per band, close to the file's EE (the mosaic's blur moves it <1%)
    fluxnjy = fits.getval(out / "mosaic_b36.fits", "FLUXNJY", extname="IMAGE")
    ref = aperture_photometry(fits.getdata(out / "mosaic_b36.fits", "IMAGE").astype(float),
                              CircularAperture(np.column_stack([t["x"], t["y"]]), 5.0),
                              method="exact")["aperture_sum"]
    ratio = np.asarray(t["flux_native_b36"]) / (np.asarray(ref) * fluxnjy)
    np.testing.assert_allclose(ratio, np.median(ratio), rtol=1e-4)
    assert np.median(ratio) == pytest.approx(1 / read_psf(out / "psf_b36.fits").encircled(0.2),
                                             rel=0.01)


def _noise_ratio(meta, band):
    """sqrt(R) of ``band`` from the PBANDnn / PNOISnn cards."""
    i = next(k[5:] for k, v in meta.items() if k.startswith("PBAND") and v == band)
    return meta[f"PNOIS{i}"]


def _stated_factor(header, r):
    """F(r) from the APNRnn / APNFnn cards, linearly interpolated (the README's rule)."""
    rad = {int(m.group(1)): header[k] for k in header if (m := re.fullmatch(r"APNR(\d\d)", k))}
    fac = {int(m.group(1)): header[k] for k in header if (m := re.fullmatch(r"APNF(\d\d)", k))}
    idx = sorted(rad)
    return float(np.interp(r, [rad[i] for i in idx], [fac[i] for i in idx]))


@pytest.mark.parametrize("band", RUN_BANDS)
def test_errors_match_empty_sky(run, band):
    """The stated errors (native: F(r) sqrt(sum 1/INVVAR) / EE; matched: also the kernel's
    noise ratio PNOISnn) agree within 10% with the robust scatter of photutils apertures
    on IMAGE minus the truth image in empty sky, native and convolved (scipy) with the
    matching kernel."""
    _, res = run
    out = res.out_dir
    t = Table.read(out / "photometry.fits", hdu="PHOTOMETRY")
    r_pix = t.meta["APER_AS"] / 0.04
    with (fits.open(out / f"mosaic_{band}.fits") as m,
          fits.open(out / f"truth_image_{band}.fits") as tr):
        diff = m["IMAGE"].data.astype(float) - tr["IMAGE"].data.astype(float)
        wht = m["INVVAR"].data.astype(float)
        factor = _stated_factor(m["INVVAR"].header, r_pix)
        bad = (wht <= 0) | ndimage.binary_dilation(tr["SEGMAP"].data > 0, iterations=4)
    var = np.where(wht > 0, 1.0 / np.where(wht > 0, wht, 1.0), 0.0)
    psf, target = read_psf(out / f"psf_{band}.fits"), read_psf(out / "psf_b36.fits")
    kernel = (np.ones((1, 1)) if band == "b36"
              else matching_kernel(psf.image, target.image, psf.pixscale, 0.04))
    conv = signal.fftconvolve(diff, kernel, mode="same")
    edge = kernel.shape[0] // 2 + r_pix + 2
    ny, nx = diff.shape
    g = np.arange(edge, nx - edge, 2 * r_pix + 1)  # apertures that do not overlap
    pos = np.array([(x, y) for y in g for x in g])
    hit = aperture_photometry(bad.astype(float), CircularAperture(pos, r_pix + 1))["aperture_sum"]
    ap = CircularAperture(pos[np.asarray(hit) == 0], r_pix)
    v = np.median(aperture_photometry(var, ap, method="exact")["aperture_sum"])
    assert len(ap) > 150
    for img, ratio in ((diff, 1.0), (conv, _noise_ratio(t.meta, band))):
        s = np.asarray(aperture_photometry(img, ap, method="exact")["aperture_sum"])
        q75, q25 = np.percentile(s, [75, 25])
        measured = (q75 - q25) / 1.349  # robust Gaussian sigma (common practice)
        # ~200-300 independent apertures: the scatter is known to ~5%
        assert measured == pytest.approx(factor * np.sqrt(v) * ratio, rel=0.10), ratio
    if band != "b36":  # the matched ratio is a real effect, not 1
        assert _noise_ratio(t.meta, band) < 0.93


# ------------------------------------------------------------------------- configuration
def test_bad_match_to_refused_in_one_line():
    """A target band the telescope does not have is refused, naming key, value and bands."""
    with pytest.raises(ConfigError, match=r"photometry\.match_to='b99' must be empty .*b10"):
        make_scenario("photometry.match_to=b99")
    with pytest.raises(ConfigError, match=r"photometry\.aperture_radius_arcsec"):
        make_scenario("photometry.aperture_radius_arcsec=0")
    assert make_scenario("photometry.match_to=b23").photometry.match_to == "b23"
