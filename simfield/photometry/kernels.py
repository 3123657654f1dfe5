"""PSF-matching kernels on the mosaic grid, and the noise of apertures on a matched image.

A band's mosaic shows its PSF including the detector pixel (``PSF_DET`` of ``psf_<band>.fits``)
further convolved with the drizzle drop (a square of pixfrac x the detector pixel) and the
mosaic pixel. Those two boxes are the same in every band (one survey geometry), so they cancel
from the matching kernel: in Fourier space K = T D / (B D) = T / B for the target's and the
band's ``PSF_DET`` transforms T and B and the common box transform D. The kernel is therefore
made from the ``PSF_DET`` images alone (photutils' matching kernel with a window, on the PSF
pixel) and then resampled to the mosaic pixel by band-limited (Fourier) interpolation, which
is exact because the window leaves no power beyond the mosaic's Nyquist frequency.

Noise of a matched aperture. With aperture weights m(x) on the matched image k * I, the sum is
sum_x m(x) (k * I)(x) = sum_y w(y) I(y) with w = m correlated with k (w(y) = sum_x m(x)
k(x - y)). For pixel noise of locally constant variance sigma^2 and correlation rho(lag)
(``NOISECOR``),

    Var = sigma^2 sum_lag rho(lag) (w * w)(lag),   (w * w)(lag) = sum_y w(y) w(y + lag),

and the native aperture has the same with m in place of w. The file states the native error
F(r) sqrt(sum m / INVVAR) (:mod:`simfield.noisecards`), so the matched error is that times
sqrt(R), R = sum rho (w * w) / sum rho (m * m) (:func:`matched_noise_ratio`).
"""

from __future__ import annotations

import numpy as np
from scipy import signal

__all__ = ["matching_kernel", "resample_kernel", "aperture_weights", "matched_noise_ratio"]

#: |target transform| below this fraction of its peak counts as "no power" (window edge)
_OTF_FLOOR = 1e-3


def _make_kernel(source, target, window):
    """photutils' matching kernel (``psf_matching.make_kernel`` since photutils 3,
    ``psf.matching.create_matching_kernel`` before)."""
    try:
        from photutils.psf_matching import SplitCosineBellWindow, make_kernel
    except ImportError:  # photutils < 3
        from photutils.psf.matching import SplitCosineBellWindow
        from photutils.psf.matching import create_matching_kernel as make_kernel
    return make_kernel(source, target, window=SplitCosineBellWindow(*window))


def _window(target: np.ndarray, nyquist: float) -> tuple[float, float]:
    """(alpha, beta) of a split cosine bell: flat out to the radius (in units of the array's
    Nyquist frequency) where the target's transform has fallen below ``_OTF_FLOOR``, tapered to
    zero by ``nyquist`` (the mosaic's Nyquist frequency in the same units)."""
    n = target.shape[0]
    otf = np.abs(np.fft.fftshift(np.fft.fft2(np.fft.ifftshift(target))))
    yy, xx = np.indices(otf.shape) - n // 2
    r = np.hypot(xx, yy) / ((n - 1) / 2.0)
    live = r[otf > _OTF_FLOOR * otf.max()]
    edge = float(live.max()) if live.size else nyquist
    beta = min(edge, 0.7 * nyquist)
    return min(nyquist - beta, 1.0 - beta), beta


def resample_kernel(kernel: np.ndarray, pix_in: float, pix_out: float) -> np.ndarray:
    """Band-limited resampling of a centred kernel to another pixel.

    Parameters
    ----------
    kernel : ndarray (dimensionless), odd square shape, centre at ``n // 2``
    pix_in, pix_out : float (arcsec)
        Pixel of ``kernel`` and of the result.

    Returns
    -------
    ndarray (dimensionless), odd square shape covering the same extent, sum 1
        The kernel's trigonometric interpolant (its discrete Fourier series) sampled at the
        new pixel centres; exact for a kernel with no power beyond the new Nyquist frequency.
    """
    n = kernel.shape[0]
    half = int(np.floor((n // 2) * pix_in / pix_out))
    f = np.fft.fftfreq(n)  # cycles per input pixel
    x_out = np.arange(-half, half + 1) * (pix_out / pix_in)
    # k(x) = (1/n) sum_f K_f exp(2 pi i f (x - x0)): a separable matrix product on each axis
    spec = np.fft.fft2(np.fft.ifftshift(kernel))
    e = np.exp(2j * np.pi * np.outer(x_out, f)) / n
    out = np.real(e @ spec @ e.T)
    return out / out.sum()


def matching_kernel(source: np.ndarray, target: np.ndarray, pix_psf: float,
                    pix_mosaic: float) -> np.ndarray:
    """Kernel k on the mosaic pixel with source * k = target (both PSFs including the detector
    pixel, same odd shape, unit sum, centred at ``n // 2``).

    Parameters
    ----------
    source, target : ndarray (dimensionless)
        PSF images on the PSF pixel ``pix_psf`` (arcsec); ``target`` the broader one.
    pix_psf, pix_mosaic : float (arcsec)

    Returns
    -------
    ndarray (dimensionless), odd square, unit sum
    """
    nyquist = min(1.0, pix_psf / pix_mosaic)  # mosaic Nyquist in units of the PSF pixel's
    k = _make_kernel(np.asarray(source, float), np.asarray(target, float),
                     _window(np.asarray(target, float), nyquist))
    return resample_kernel(k, pix_psf, pix_mosaic)


def aperture_weights(radius_pix: float) -> np.ndarray:
    """Exact-overlap weights (0..1) of a circular aperture of ``radius_pix`` (mosaic pixels)
    centred on a pixel centre, on an odd square grid."""
    from photutils.aperture import CircularAperture

    h = int(np.ceil(radius_pix)) + 1
    return CircularAperture((h, h), radius_pix).to_mask(method="exact").to_image((2 * h + 1,) * 2)


def matched_noise_ratio(rho: np.ndarray, kernel: np.ndarray, radius_pix: float) -> float:
    """R = Var(matched aperture) / Var(native aperture) (dimensionless), module docstring.

    Parameters
    ----------
    rho : ndarray (dimensionless), odd square, centre 1
        Correlation of the mosaic's pixel noise at lags (``NOISECOR``); zero beyond it.
    kernel : ndarray (dimensionless), odd square, unit sum
        Matching kernel on the mosaic pixel (a single 1 for the target band).
    radius_pix : float (mosaic pixels)
    """
    m = aperture_weights(radius_pix)
    w = signal.correlate(m, kernel, mode="full")
    kr = rho.shape[0] // 2

    def lag_sum(a):
        auto = np.pad(signal.correlate(a, a, mode="full"), kr)  # rho may reach further
        c = auto.shape[0] // 2
        return float(np.sum(rho * auto[c - kr:c + kr + 1, c - kr:c + kr + 1]))

    return lag_sum(w) / lag_sum(m)
