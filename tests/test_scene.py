"""Scene rendering: flux conservation, FFT convolution, stamps."""

import galsim
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import signal

from simfield.scene import (accumulate, add_bright, convolve_tiled, dominant_source,
                            draw_profile_stamp, draw_stamps, point_stamp, supersampled_radius,
                            supersampling)


def test_convolve_tiled_matches_scipy():
    """Tiled overlap-add equals scipy.signal.fftconvolve(mode='same') (reference library)."""
    rng = np.random.default_rng(3)
    img = rng.random((301, 257))
    ker = rng.random((31, 21))
    ker /= ker.sum()
    ref = signal.fftconvolve(img, ker, mode="same")
    assert_allclose(convolve_tiled(img, ker, tile=64), ref, rtol=0, atol=1e-10)
    assert_allclose(convolve_tiled(img, ker, tile=1000), ref, rtol=0, atol=1e-10)


def test_convolve_tiled_kernel_cache_follows_content():
    """The cached kernel transform is keyed by the kernel's values: two kernels of one shape,
    and a kernel changed in place, each still give scipy.signal.fftconvolve's result."""
    rng = np.random.default_rng(4)
    img = rng.random((120, 90)).astype(np.float32)
    k1, k2 = rng.random((15, 15)), rng.random((15, 15))
    for ker in (k1, k2, k1):
        assert_allclose(convolve_tiled(img, ker), signal.fftconvolve(img, ker, mode="same"),
                        rtol=0, atol=1e-4)
    k1 *= 2.0
    assert_allclose(convolve_tiled(img, k1), signal.fftconvolve(img, k1, mode="same"),
                    rtol=0, atol=2e-4)


def test_convolution_conserves_flux_away_from_edges():
    """A normalised kernel conserves flux of sources away from the edges (to 0.5%, issue rule)."""
    img = np.zeros((400, 400), np.float32)
    img[150:250, 120:260] = 1.0
    ker = galsim.Airy(lam_over_diam=0.1).drawImage(nx=61, ny=61, scale=0.02).array
    ker /= ker.sum()
    out = convolve_tiled(img, ker, tile=128)
    assert abs(out.sum() / img.sum() - 1) < 5e-3


def test_point_stamp_centroid_is_exact():
    """Bilinear splitting puts the first moment exactly at the position (common practice)."""
    st = point_stamp(10.3, 20.75, 0)
    yy, xx = np.mgrid[0:2, 0:2]
    assert_allclose(st.image.sum(), 1.0, rtol=1e-6)
    assert_allclose((st.image * (xx + st.ix0)).sum(), 10.3, atol=1e-6)
    assert_allclose((st.image * (yy + st.iy0)).sum(), 20.75, atol=1e-6)


def test_profile_stamp_matches_galsim_pixel_integration():
    """Supersampled drawing agrees with GalSim's exact pixel-integrated drawing of a Gaussian."""
    prof = galsim.Gaussian(sigma=0.05).shear(q=0.5, beta=30 * galsim.degrees)
    st = draw_profile_stamp(prof, 50.4, 60.7, 0.02, 15, 0, supersample=5)
    ref = prof.drawImage(nx=31, ny=31, scale=0.02, offset=(0.4, -0.3)).array
    ref /= ref.sum()
    assert_allclose(st.image, ref, atol=2e-3 * ref.max())
    # centroid at the requested position
    yy, xx = np.mgrid[0:31, 0:31]
    assert_allclose((st.image * (xx + st.ix0)).sum(), 50.4, atol=2e-3)
    assert_allclose((st.image * (yy + st.iy0)).sum(), 60.7, atol=2e-3)


def test_accumulate_and_bright_path_conserve_flux():
    """Faint stamps + bright stamps convolved separately keep each source's flux (0.5%)."""
    items = [(0, None, 40.2, 50.9, 0.0),
             (1, galsim.Exponential(half_light_radius=0.1), 120.0, 80.0, 5.0),
             (2, None, 100.5, 100.5, 0.0)]
    stamps = draw_stamps(items, 0.02)
    flux = np.array([10.0, 5.0, 1000.0])
    bright = np.array([False, False, True])
    ker = galsim.Airy(lam_over_diam=0.08).drawImage(nx=41, ny=41, scale=0.02).array
    ker /= ker.sum()
    big = galsim.Airy(lam_over_diam=0.08).drawImage(nx=121, ny=121, scale=0.02).array
    big /= big.sum()
    img = convolve_tiled(accumulate(stamps, flux, (200, 200), select=~bright), ker)
    add_bright(img, stamps, flux, bright, big)
    assert abs(img.sum() / flux.sum() - 1) < 5e-3


def test_bright_path_matches_scipy_with_a_field_dependent_core():
    """add_bright's single-precision transforms, with a per-stamp core added to the centre of
    the large kernel (the field-dependent PSF's path), against scipy.signal.fftconvolve in
    double precision (reference library) of each stamp with the summed kernel: equal to
    3e-7 of the brightest pixel (float32 round-off), placed to the pixel, flux kept."""
    from scipy.signal import fftconvolve

    from simfield.scene import Stamp

    rng = np.random.default_rng(3)
    big = galsim.Airy(lam_over_diam=0.08, obscuration=0.3).drawImage(
        nx=121, ny=121, scale=0.02).array
    big /= big.sum()
    cores = {0: rng.normal(0, 1e-3, (31, 31)), 1: rng.normal(0, 1e-3, (31, 31)), 2: None}
    stamps = [Stamp(rng.random((23, 17)).astype(np.float32), 30, 40, 0),
              Stamp(rng.random((9, 9)).astype(np.float32), 150, 170, 1),  # partly outside
              Stamp(rng.random((5, 7)).astype(np.float32), 90, 60, 2)]
    flux = np.array([3.0, 2.0, 5.0])
    got = np.zeros((200, 210), np.float32)
    add_bright(got, stamps, flux, np.ones(3, bool), big, origin=(10, 20),
               delta=lambda st: cores[st.index])
    want = np.zeros((200 + 400, 210 + 400))  # room for the part outside, cut below
    for st in stamps:
        k = big.copy()
        if cores[st.index] is not None:
            k[45:76, 45:76] += cores[st.index]
        full = fftconvolve(st.image.astype(float), k) * flux[st.index]
        y0, x0 = st.iy0 - 60 - 10 + 200, st.ix0 - 60 - 20 + 200
        want[y0:y0 + full.shape[0], x0:x0 + full.shape[1]] += full
    want = want[200:400, 200:410]
    np.testing.assert_allclose(got, want, rtol=0, atol=3e-7 * want.max())
    assert abs(got.sum() - want.sum()) < 1e-5 * want.sum()


def test_dominant_source_picks_brighter_neighbour():
    """Where two sources overlap, the segmentation names the one contributing more light."""
    stamps = [point_stamp(20, 20, 0), point_stamp(26, 20, 1)]
    ker = np.ones((9, 9)) / 81
    ids = dominant_source(stamps, np.array([1.0, 3.0]), np.array([7, 9]), (40, 40), ker,
                          threshold=1e-3)
    assert ids[20, 20] == 7 and ids[20, 26] == 9
    assert ids[20, 23] == 9  # equal distance: the brighter wins
    assert ids[0, 0] == 0


@pytest.mark.parametrize("n_sersic,r_half", [(4.0, 0.03), (4.0, 0.1), (1.0, 0.06), (1.5, 0.012)])
def test_core_supersampling_matches_galsim_pixel_integration(n_sersic, r_half):
    """Sub-sampling only the core (and the cusp finer) agrees with GalSim's pixel-integrated
    (FFT, method 'auto') drawing of compact Sersic profiles to 3.5% of the peak pixel and 0.5%
    of the flux within 0.1"."""
    scale = 0.02
    prof = galsim.Sersic(n_sersic, half_light_radius=r_half, trunc=10 * r_half,
                         flux_untruncated=True).shear(q=0.6, beta=20 * galsim.degrees)
    h = 25
    m = supersampling(r_half / scale)
    st = draw_profile_stamp(prof, 50.3, 60.6, scale, h, 0, m,
                            core_radius=supersampled_radius(r_half / scale))
    ref = prof.drawImage(nx=2 * h + 1, ny=2 * h + 1, scale=scale, offset=(0.3, -0.4),
                         method="auto").array
    ref /= ref.sum()
    assert_allclose(st.image, ref, rtol=0, atol=3.5e-2 * ref.max())
    yy, xx = np.mgrid[-h:h + 1, -h:h + 1]
    inner = (xx - 0.3) ** 2 + (yy + 0.4) ** 2 <= (0.1 / scale) ** 2
    assert_allclose(st.image[inner].sum(), ref[inner].sum(), rtol=5e-3)


def test_stacked_stamp_convolutions_equal_scipy_fftconvolve():
    """The stamps dominant_source convolves as stacks (one per FFT shape) give what
    scipy.signal.fftconvolve(mode="full") gives for each (the reference library): exactly for
    float64 stamps, and within single precision (1e-6 of the peak) for float32 stamps, whose
    forward transform is done in float32 (as the scene's stamps are)."""
    from scipy import signal

    from simfield.scene import _full_convs

    rng = np.random.default_rng(3)
    kernel = rng.random((15, 15))
    imgs = [rng.random((int(rng.integers(3, 30)), int(rng.integers(3, 30)))).astype(dt)
            for dt in (np.float32, np.float64) for _ in range(40)]
    spectra = {}
    for img, got in zip(imgs, _full_convs(imgs, kernel, spectra)):
        ref = signal.fftconvolve(img.astype(np.float64), kernel, mode="full")
        assert got.shape == ref.shape
        if img.dtype == np.float64:
            assert np.array_equal(got, ref)
        else:
            assert np.abs(got - ref).max() < 1e-6 * ref.max()
    assert 1 < len(spectra) < len(imgs)  # stamps shared FFT shapes


def test_kernels_sharing_the_forward_transforms_give_the_separate_convolutions():
    """convolve_weighted(..., also=kernels) reuses each tile's forward transform for more
    kernels: its outputs equal convolve_tiled with each kernel and the plain call exactly
    (the same transforms), and convolve_tiled agrees with scipy.signal.fftconvolve
    (mode='same'; the reference library) to float32 round-off."""
    from scipy import signal

    from simfield.scene import convolve_weighted

    rng = np.random.default_rng(5)
    img = rng.random((150, 130)).astype(np.float32)
    kern, extra = rng.random((2, 11, 11)).astype(np.float32)
    mode = rng.random((11, 11)).astype(np.float32)
    weight = rng.random(img.shape).astype(np.float32)
    for modes, weights in (((), ()), ((mode,), (weight,))):
        plain = convolve_weighted(img, kern, modes, weights, tile=64)
        got, (a, b) = convolve_weighted(img, kern, modes, weights, tile=64, also=(extra, kern))
        assert np.array_equal(got, plain)
        assert np.array_equal(a, convolve_tiled(img, extra, tile=64))
        assert np.array_equal(b, convolve_tiled(img, kern, tile=64))
    ref = signal.fftconvolve(img.astype(np.float64), extra.astype(np.float64), mode="same")
    assert np.abs(a - ref).max() < 1e-5 * ref.max()
    with pytest.raises(ValueError, match="shape"):
        convolve_weighted(img, kern, (), (), also=(np.ones((5, 5), np.float32),))
