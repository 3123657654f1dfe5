"""Polychromatic point-spread functions of a rastered pupil.

Monochromatic PSF (Fraunhofer diffraction, Born & Wolf, Principles of Optics, ch. 8):
the field at sky angle theta (rad) is E(theta) = int P(x) exp(-2 pi i x.theta / lambda) d^2x with
P = amplitude * exp(2 pi i OPD / lambda). It is evaluated by a matrix Fourier transform
(E = A P A^T, A[k, j] = exp(-2 pi i theta_k x_j / lambda)), so any output sampling is exact, with
no FFT padding rules. The raster holds cell averages of the true pupil, whose transform is the
true one times sinc(theta dx / lambda) per axis (plus periodic copies every lambda / dx); that
factor is divided out, and the raster is made fine enough that the copies lie at least
``_PERIOD_FACTOR`` stamp widths away. Intensities are normalised to the total flux of the
true pupil, lambda^2 * area (Parseval), so peak / total = area / lambda^2.

Band PSF: ``n_wavelengths`` monochromatic PSFs at the photon-weighted centres of equal-width
bins spanning the band. A source with f_lambda ~ lambda^beta (``reference_beta``) gives
photon counts per unit wavelength ~ T(lambda) f_lambda lambda / (h c) ~ T(lambda) lambda^(beta+1);
the weight of a bin is the integral of that over the bin. The sum is convolved with Gaussian
pointing jitter (rms ``jitter_mas`` per axis) and integrated over square pixels of side
``scale_arcsec``: the intensity is computed on a grid at least ``oversample`` times finer and
fine enough to Nyquist-sample the shortest wavelength (step <= lambda / (2 D)), where it is
band-limited, so both convolutions are exact: its discrete Fourier transform is multiplied by
exp(-2 pi^2 sigma^2 f^2) sinc(f * scale) per axis and summed back at the pixel centres (a
matrix transform, so the fine step need not divide the pixel).
Within one bin the PSF is taken as monochromatic, so far-wing speckle is smoothed only by the
sum over bins.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from ..bands import Band
from ..config import TelescopeConfig
from ..errors import check_range, require
from ..io import atomic_path
from .pupil import Pupil, pupil_extent_m, scenario_pupil, with_segment_terms, with_zernike

__all__ = [
    "PSFImage",
    "monochromatic_psf",
    "band_wavelengths",
    "band_psf",
    "effective_psf",
    "cached_band_psf",
    "measure_fwhm",
    "encircled_energy",
    "write_psf_png",
    "cached_psf_png",
]

_RAD_PER_ARCSEC = np.pi / 180.0 / 3600.0
#: pupil raster period lambda / dx in units of the PSF stamp width: the nearest periodic copy of
#: the PSF core then sits two half-widths beyond the stamp edge. Measured on the 8" b10 Lantern
#: PSF against a 3x finer raster (benchmarks/bench_psf.py --convergence): the summed |error| is
#: 3e-5 inside 1", 1 % at 3-5", 2 % at 5-7" and 4 % at the stamp edge.
_PERIOD_FACTOR = 1.5
_CACHE_VERSION = 3  # bump when the computation changes
_PICTURE_VERSION = 2  # bump when the PSF picture changes
_EE_INNER_PIX = 30  # encircled energy: pixels within this many of the centre are subsampled


@dataclass(frozen=True, eq=False)
class PSFImage:
    """A band PSF integrated over square pixels.

    Attributes
    ----------
    image : ndarray (dimensionless), shape (n, n), n odd
        Fraction of the stamp's flux in each pixel (sums to 1); the optical axis is the centre
        of the central pixel ``image[n // 2, n // 2]``; axes as the pupil raster (x = column).
    scale_arcsec : float (arcsec)
        Pixel side.
    band : str
        Band name.
    pivot_nm : float (nm)
        Pivot wavelength of the band.
    fwhm_arcsec : float (arcsec)
        Full width at half maximum, 2 sqrt(area above half maximum / pi).
    ee_radii_arcsec, ee_values : ndarray (arcsec), ndarray (dimensionless)
        Encircled energy (fraction of the stamp flux) inside circles of these radii.
    strehl : float (dimensionless)
        Band-weighted on-axis Strehl ratio of the pupil (wavefront error only).
    flux_fraction : float (dimensionless)
        Fraction of the PSF's total flux inside the stamp before normalisation.
    from_cache : bool
        True when read back from the disk cache.
    """

    image: np.ndarray
    scale_arcsec: float
    band: str
    pivot_nm: float
    fwhm_arcsec: float
    ee_radii_arcsec: np.ndarray
    ee_values: np.ndarray
    strehl: float = 1.0
    flux_fraction: float = 1.0
    from_cache: bool = False

    @property
    def radius_arcsec(self) -> float:
        """Half-size of the stamp from the centre to the outer edge of the last pixel (arcsec)."""
        return (self.image.shape[0] / 2.0) * self.scale_arcsec

    def ee_at(self, radius_arcsec: float) -> float:
        """Encircled energy (fraction of the stamp flux) inside ``radius_arcsec`` (arcsec)."""
        return float(np.interp(radius_arcsec, self.ee_radii_arcsec, self.ee_values))


# --------------------------------------------------------------------------------------------
# monochromatic
# --------------------------------------------------------------------------------------------
def _transform_matrix(theta_rad: np.ndarray, pupil: Pupil, wavelength_m: float) -> np.ndarray:
    """A[k, j] = exp(-2 pi i theta_k x_j / lambda) / sinc(theta_k dx / lambda), complex64.

    ``theta_rad`` must be symmetric about 0 (theta[-1 - k] = -theta[k]); the second half of the
    rows is then the complex conjugate of the first.
    """
    m = theta_rad.size
    h = (m + 1) // 2
    phase = np.outer(theta_rad[:h], pupil.coords_m) * (-2.0 * np.pi / wavelength_m)
    phase = np.mod(phase, 2.0 * np.pi).astype(np.float32)  # reduce in float64, then float32
    taper = np.sinc(theta_rad[:h] * pupil.scale_m / wavelength_m).astype(np.float32)[:, None]
    a = np.empty((m, pupil.size), dtype=np.complex64)
    a[:h].real = np.cos(phase) / taper
    a[:h].imag = np.sin(phase) / taper
    a[h:] = np.conj(a[: m - h][::-1])
    return a


def _intensity(pupil: Pupil, wavelength_nm: float, theta_rad: np.ndarray) -> np.ndarray:
    """PSF on the grid theta_rad x theta_rad (rad), per steradian per unit total flux (sr^-1).

    ``theta_rad`` must be symmetric about 0. For a pupil without wavefront error the field is
    real, so E(-theta) = conj(E(theta)) and only half of the rows are transformed.
    """
    lam = wavelength_nm * 1e-9
    a = _transform_matrix(theta_rad, pupil, lam)
    m = theta_rad.size
    if np.any(pupil.opd_nm):
        field = (pupil.amplitude * np.exp(2j * np.pi * pupil.opd_nm / wavelength_nm)).astype(
            np.complex64)
        e = a @ (field @ a.T)  # e[ky, kx]: rows = y, columns = x
    else:
        amp = pupil.amplitude.astype(np.float32)
        inner = np.empty((pupil.size, m), dtype=np.complex64)
        inner.real = amp @ np.ascontiguousarray(a.real.T)
        inner.imag = amp @ np.ascontiguousarray(a.imag.T)
        e = a[: (m + 1) // 2] @ inner
    # |E|^2 with E = sum a exp(.) dx^2, over the true total flux lambda^2 * area
    norm = pupil.scale_m**4 / (lam**2 * pupil.area_m2)
    half = (e.real.astype(np.float64) ** 2 + e.imag.astype(np.float64) ** 2) * norm
    if half.shape[0] == m:
        return half
    out = np.empty((m, m))
    out[: half.shape[0]] = half
    out[half.shape[0]:] = half[: m - half.shape[0]][::-1, ::-1]
    return out


def _on_axis_strehl(pupil: Pupil, wavelength_nm: float) -> float:
    """|sum a exp(i phi)|^2 / |sum a|^2 (dimensionless)."""
    if not np.any(pupil.opd_nm):
        return 1.0
    a = pupil.amplitude
    s = (a * np.exp(2j * np.pi * pupil.opd_nm / wavelength_nm)).sum()
    return float(abs(s) ** 2 / a.sum() ** 2)


def monochromatic_psf(pupil: Pupil, wavelength_nm: float, scale_arcsec: float,
                      npix: int) -> np.ndarray:
    """Monochromatic PSF sampled (not pixel-integrated) on an npix x npix grid.

    Parameters
    ----------
    pupil : Pupil
        The rastered pupil.
    wavelength_nm : float (nm)
        Wavelength.
    scale_arcsec : float (arcsec)
        Sample spacing.
    npix : int
        Samples per side; sample ``k`` sits at ``(k - (npix - 1) / 2) * scale_arcsec``.

    Returns
    -------
    ndarray (dimensionless), shape (npix, npix)
        Intensity times the sample area, as a fraction of the total flux (all angles) of the
        pupil, so that it sums to the enclosed fraction and its peak is area * dtheta^2 / lambda^2.
    """
    check_range("wavelength_nm", wavelength_nm, 0, None, lo_open=True)
    check_range("scale_arcsec", scale_arcsec, 0, None, lo_open=True)
    check_range("npix", npix, 1, 20001)
    theta = (np.arange(npix) - (npix - 1) / 2.0) * (scale_arcsec * _RAD_PER_ARCSEC)
    return _intensity(pupil, wavelength_nm, theta) * (scale_arcsec * _RAD_PER_ARCSEC) ** 2


# --------------------------------------------------------------------------------------------
# band
# --------------------------------------------------------------------------------------------
def band_wavelengths(band: Band, n: int, beta: float) -> tuple[np.ndarray, np.ndarray]:
    """Wavelengths (nm) and photon weights (sum 1) of ``n`` equal-width bins across ``band``.

    The band spans where its throughput exceeds 1e-3 of the maximum. A bin's weight is
    int T(lambda) lambda^(beta + 1) dlambda over the bin (photon counts from f_lambda ~
    lambda^beta) and its wavelength the weight-averaged wavelength of the bin.
    """
    t = band.throughput
    on = np.flatnonzero(t > 1e-3 * t.max())
    lo, hi = band.wave[on[0]], band.wave[on[-1]]
    edges = np.linspace(lo, hi, n + 1)
    fine = np.linspace(lo, hi, 64 * n + 1)
    dens = np.interp(fine, band.wave, t) * fine ** (beta + 1.0)
    lam, w = np.empty(n), np.empty(n)
    for i in range(n):
        m = (fine >= edges[i]) & (fine <= edges[i + 1])
        w[i] = np.trapezoid(dens[m], fine[m])
        lam[i] = np.trapezoid(dens[m] * fine[m], fine[m]) / w[i]
    return lam, w / w.sum()


_PUPILS: dict[tuple, Pupil] = {}


def _band_pupil(tel: TelescopeConfig, seed: int, n: int) -> Pupil:
    """The scenario's pupil (wavefront draws from stream(seed, 'optics', 'pupil')) at n cells."""
    key = (json.dumps(dataclasses.asdict(tel.pupil), sort_keys=True), tel.diameter_m, seed, n)
    if key not in _PUPILS:
        if len(_PUPILS) >= 8:
            _PUPILS.pop(next(iter(_PUPILS)))
        _PUPILS[key] = scenario_pupil(tel, seed, grid_size=n)
    return _PUPILS[key]


def _resample_pixels(fine: np.ndarray, step: float, scale: float, npix: int,
                     sigma: float, box: bool = True) -> np.ndarray:
    """Band-limited ``fine`` (odd size, sample spacing ``step``, centre sample at 0) convolved
    with a Gaussian of rms ``sigma`` and (if ``box``) a box of side ``scale``, at npix x npix
    pixel centres spaced ``scale`` (same angular unit throughout); exact by Fourier series for
    a Nyquist-sampled image, via a matrix transform so ``scale / step`` need not be an
    integer. Without the box the values are the density at the centres times scale^2."""
    m = fine.shape[0]
    spec = np.fft.rfft2(np.fft.ifftshift(fine))  # sample 0 at angle 0; half spectrum along x
    f = np.fft.fftfreq(m, d=step)  # cycles per unit angle
    fx = np.abs(f[: spec.shape[1]])
    # Gaussian of rms s: transfer exp(-2 pi^2 s^2 f^2); unit box of side w: sinc(w f)
    w = scale if box else 0.0  # sinc(0) = 1: no pixel box
    t_y = np.exp(-2.0 * np.pi**2 * sigma**2 * f**2) * np.sinc(w * f)
    t_x = np.exp(-2.0 * np.pi**2 * sigma**2 * fx**2) * np.sinc(w * fx)
    spec *= t_y[:, None] * t_x[None, :]
    centres = (np.arange(npix) - (npix - 1) / 2.0) * scale
    g = np.exp(2j * np.pi * np.outer(centres, f)) @ spec  # inverse along y, complex
    # inverse along x of a Hermitian spectrum: real part, the half-spectrum terms other than
    # f = 0 (m odd: no Nyquist term) counted twice
    wgt = np.full(fx.size, 2.0)
    wgt[0] = 1.0
    phase = 2.0 * np.pi * np.outer(fx, centres)
    img = g.real @ (wgt[:, None] * np.cos(phase)) - g.imag @ (wgt[:, None] * np.sin(phase))
    # 1 / m^2 of the inverse DFT; density per fine sample -> fraction per pixel: (scale/step)^2
    return img * (scale / step) ** 2 / m**2


def band_psf(tel: TelescopeConfig, band: Band, scale_arcsec: float, radius_arcsec: float,
             seed: int = 0, pixel_integrated: bool = True,
             field_zernike_nm: Sequence[float] = (), segment_terms_nm=None) -> PSFImage:
    """Polychromatic, jittered PSF of ``tel`` in ``band``, pixel-integrated or sampled.

    Parameters
    ----------
    tel : TelescopeConfig
        Telescope (pupil geometry in m, PSF settings in ``tel.psf``).
    band : Band
        The band (wavelengths in nm).
    scale_arcsec : float (arcsec)
        Pixel side of the output image (the scene pixel).
    radius_arcsec : float (arcsec)
        Half-size of the stamp: ``2 * ceil(radius / scale) + 1`` pixels per side.
    seed : int
        Scenario seed; the wavefront error is drawn from ``stream(seed, "optics", "pupil")``,
        the same for every band.
    pixel_integrated : bool
        True: each value is the PSF integrated over its pixel. False: the PSF density at the
        pixel centre times the pixel area, the kernel to convolve a scene whose sources are
        already integrated over its pixels (the pixel box is then applied once, not twice).
    field_zernike_nm : sequence of float (nm)
        Global Noll 4, 5, ... terms added to the wavefront error (the field-dependent part at
        one field point, see :mod:`simfield.optics.field`); empty: the field centre.
    segment_terms_nm : ndarray (nm), shape (n_segments, 3), optional
        Segment piston, tip and tilt added to the wavefront error (one exposure's drift, see
        :mod:`simfield.optics.drift`), net tilt removed.

    Returns
    -------
    PSFImage
        Normalised to sum 1 over the stamp.
    """
    check_range("scale_arcsec", scale_arcsec, 0, 10, lo_open=True)
    check_range("radius_arcsec", radius_arcsec, scale_arcsec, 600)
    require(isinstance(seed, (int, np.integer)) and seed >= 0, "seed", seed,
            "must be a non-negative integer")
    ps = tel.psf
    lam, w = band_wavelengths(band, int(ps.n_wavelengths), float(ps.reference_beta))
    extent = pupil_extent_m(tel)
    half = int(np.ceil(radius_arcsec / scale_arcsec - 1e-9))
    # the intensity is band-limited (cut-off D / lambda): sampling at
    # step <= lambda_min / (2 D) represents it exactly (Nyquist)
    nyquist_arcsec = lam.min() * 1e-9 / (2.0 * extent) / _RAD_PER_ARCSEC
    step = min(scale_arcsec / int(ps.oversample), nyquist_arcsec)
    # fine samples reach two pixels beyond the stamp, dropped after the convolutions
    nhalf = int(np.ceil((half + 2) * scale_arcsec / step))
    theta = np.arange(-nhalf, nhalf + 1) * (step * _RAD_PER_ARCSEC)
    width_rad = theta.size * step * _RAD_PER_ARCSEC
    n_pupil = max(int(tel.pupil.grid_size),
                  int(np.ceil(_PERIOD_FACTOR * width_rad * extent / (lam.min() * 1e-9))) + 2)
    pupil = with_zernike(_band_pupil(tel, int(seed), n_pupil), field_zernike_nm,
                         tel.diameter_m / 2.0)
    if segment_terms_nm is not None:
        pupil = with_segment_terms(pupil, tel, segment_terms_nm)

    fine = np.zeros((theta.size, theta.size))
    strehl = 0.0
    for lam_i, w_i in zip(lam, w):
        fine += w_i * _intensity(pupil, lam_i, theta)
        strehl += w_i * _on_axis_strehl(pupil, lam_i)
    fine *= (step * _RAD_PER_ARCSEC) ** 2  # fraction of the total flux per fine sample
    image = _resample_pixels(fine, step, scale_arcsec, 2 * half + 1, ps.jitter_mas / 1000.0,
                             box=pixel_integrated)
    total = float(image.sum())
    image = image / total
    radii, ee = encircled_energy(image, scale_arcsec)
    return PSFImage(image=image, scale_arcsec=float(scale_arcsec), band=band.name,
                    pivot_nm=band.pivot_nm, fwhm_arcsec=measure_fwhm(image, scale_arcsec),
                    ee_radii_arcsec=radii, ee_values=ee, strehl=strehl, flux_fraction=total)


# --------------------------------------------------------------------------------------------
# measurements
# --------------------------------------------------------------------------------------------
def measure_fwhm(image: np.ndarray, scale_arcsec: float, upsample: int = 8) -> float:
    """FWHM (arcsec) = 2 sqrt(A / pi), A the area where the image, cubic-spline-interpolated
    ``upsample`` times finer around its peak, exceeds half the peak (exact for a circular
    profile)."""
    from scipy.ndimage import zoom

    cy, cx = np.unravel_index(np.argmax(image), image.shape)
    peak = image[cy, cx]
    above = image >= 0.5 * peak
    ys, xs = np.nonzero(above)
    r = int(max(np.abs(ys - cy).max(), np.abs(xs - cx).max())) + 3
    y0, y1 = max(cy - r, 0), min(cy + r + 1, image.shape[0])
    x0, x1 = max(cx - r, 0), min(cx + r + 1, image.shape[1])
    fine = zoom(image[y0:y1, x0:x1], upsample, order=3, grid_mode=True, mode="grid-constant")
    area = np.count_nonzero(fine >= 0.5 * fine.max()) * (scale_arcsec / upsample) ** 2
    return float(2.0 * np.sqrt(area / np.pi))


def encircled_energy(image: np.ndarray, scale_arcsec: float,
                     radii_arcsec: np.ndarray | None = None, subsample: int = 4
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Encircled energy about the central pixel's centre.

    Within ``_EE_INNER_PIX`` pixels of the centre each pixel's value is spread uniformly over
    ``subsample`` x ``subsample`` points; farther out it sits at the pixel centre.

    Parameters
    ----------
    image : ndarray, shape (n, n), n odd
    scale_arcsec : float (arcsec)
    radii_arcsec : ndarray (arcsec), optional
        Default: half-pixel steps out to the stamp edge.

    Returns
    -------
    radii_arcsec, ee : ndarray (arcsec), ndarray (fraction of ``image.sum()``)
    """
    n = image.shape[0]
    if radii_arcsec is None:
        radii_arcsec = scale_arcsec * 0.5 * np.arange(1, n + 1)
    radii_arcsec = np.asarray(radii_arcsec, dtype=float)
    c = (n - 1) // 2
    k = min(c, _EE_INNER_PIX)
    # inner (2k+1)^2 pixels: subsample^2 points each; outer pixels: one point at the centre
    sub = (np.arange(subsample) + 0.5) / subsample - 0.5
    pos = ((np.arange(-k, k + 1)[:, None] + sub[None, :]).ravel()) * scale_arcsec
    r_in = np.hypot(pos[:, None], pos[None, :]).ravel()
    inner = image[c - k:c + k + 1, c - k:c + k + 1]
    v_in = np.repeat(np.repeat(inner, subsample, axis=0), subsample, axis=1).ravel() / subsample**2
    yy, xx = np.mgrid[0:n, 0:n] - c
    outer = (np.abs(yy) > k) | (np.abs(xx) > k)
    r_out = np.hypot(xx[outer], yy[outer]) * scale_arcsec
    r = np.concatenate([r_in, r_out])
    v = np.concatenate([v_in, image[outer]])
    # a point at r counts towards every radius >= r
    idx = np.searchsorted(radii_arcsec, r, side="left")
    ring = np.bincount(idx, weights=v, minlength=radii_arcsec.size + 1)
    ee = np.cumsum(ring)[: radii_arcsec.size] / image.sum()
    return radii_arcsec, ee


def effective_psf(psf: PSFImage, detector_pixel_arcsec: float) -> PSFImage:
    """``psf`` convolved with a square detector pixel of side ``detector_pixel_arcsec``.

    The convolution multiplies the image's discrete Fourier transform by
    sinc(f * detector_pixel) per axis (the stamp is zero-padded first), which is exact when the
    stamp Nyquist-samples the optical PSF and a close approximation otherwise.

    Parameters
    ----------
    psf : PSFImage
        Scene-pixel PSF (sampled, ``pixel_integrated=False``, for the effective PSF of the
        detector pixel alone).
    detector_pixel_arcsec : float (arcsec)
        Detector pixel side.

    Returns
    -------
    PSFImage
        Same sampling as ``psf``, with FWHM and encircled energy of the effective PSF.
    """
    check_range("detector_pixel_arcsec", detector_pixel_arcsec, 0, None, lo_open=True)
    ratio = detector_pixel_arcsec / psf.scale_arcsec
    pad = int(np.ceil(ratio)) + 2
    big = np.pad(psf.image, pad)
    fy = np.fft.fftfreq(big.shape[0])[:, None]
    fx = np.fft.rfftfreq(big.shape[1])[None, :]
    conv = np.fft.irfft2(np.fft.rfft2(big) * np.sinc(ratio * fx) * np.sinc(ratio * fy),
                         s=big.shape)
    img = conv[pad:-pad, pad:-pad]
    img = img / img.sum()
    radii, ee = encircled_energy(img, psf.scale_arcsec, psf.ee_radii_arcsec)
    return dataclasses.replace(psf, image=img, fwhm_arcsec=measure_fwhm(img, psf.scale_arcsec),
                               ee_radii_arcsec=radii, ee_values=ee, from_cache=False)


# --------------------------------------------------------------------------------------------
# disk cache
# --------------------------------------------------------------------------------------------
def _cache_key(tel: TelescopeConfig, band: Band, scale_arcsec: float, radius_arcsec: float,
               seed: int, pixel_integrated: bool = True,
               field_zernike_nm: Sequence[float] = (), segment_terms_nm=None) -> str:
    ps = tel.psf
    desc = {
        "version": _CACHE_VERSION,
        "pupil": dataclasses.asdict(tel.pupil),
        "diameter_m": float(tel.diameter_m),
        "psf": {k: getattr(ps, k) for k in ("oversample", "n_wavelengths", "reference_beta",
                                            "jitter_mas")},
        "band": band.name,
        "wave": hashlib.sha256(np.ascontiguousarray(band.wave, dtype=float).tobytes()).hexdigest(),
        "throughput": hashlib.sha256(
            np.ascontiguousarray(band.throughput, dtype=float).tobytes()).hexdigest(),
        "scale_arcsec": float(scale_arcsec),
        "radius_arcsec": float(radius_arcsec),
        "seed": int(seed),
        "pixel_integrated": bool(pixel_integrated),
    }
    if np.any(field_zernike_nm):  # field centre: the key of a plain band PSF
        desc["field_zernike_nm"] = [float(z) for z in field_zernike_nm]
    if segment_terms_nm is not None and np.any(segment_terms_nm):
        desc["segment_terms_nm"] = hashlib.sha256(
            np.ascontiguousarray(segment_terms_nm, dtype=float).tobytes()).hexdigest()
    return hashlib.sha256(json.dumps(desc, sort_keys=True).encode()).hexdigest()


def cached_band_psf(tel: TelescopeConfig, band: Band, scale_arcsec: float,
                    radius_arcsec: float, seed: int = 0,
                    cache_dir: str | os.PathLike | None = None,
                    pixel_integrated: bool = True,
                    field_zernike_nm: Sequence[float] = (), segment_terms_nm=None,
                    store: bool = True) -> PSFImage:
    """:func:`band_psf`, read from / written to an ``.npz`` disk cache.

    The file name holds a SHA-256 of everything that changes the PSF (pupil and PSF settings,
    the band's throughput arrays, scale, radius, seed, code version); files are written to a
    temporary name and renamed into place, so concurrent jobs never read partial files.

    Parameters
    ----------
    cache_dir : path, optional
        Default ``tel.psf.cache_dir``.
    store : bool
        Write a PSF that is not in the cache into it (False: read only, e.g. for a check made
        before a run that may be refused).
    """
    folder = Path(cache_dir if cache_dir is not None else tel.psf.cache_dir)
    key = _cache_key(tel, band, scale_arcsec, radius_arcsec, seed, pixel_integrated,
                     field_zernike_nm, segment_terms_nm)
    path = folder / f"psf_{band.name}_{key[:20]}.npz"
    if path.exists():
        with np.load(path) as d:
            return PSFImage(image=d["image"], scale_arcsec=float(d["scale_arcsec"]),
                            band=str(d["band"]), pivot_nm=float(d["pivot_nm"]),
                            fwhm_arcsec=float(d["fwhm_arcsec"]),
                            ee_radii_arcsec=d["ee_radii_arcsec"], ee_values=d["ee_values"],
                            strehl=float(d["strehl"]), flux_fraction=float(d["flux_fraction"]),
                            from_cache=True)
    psf = band_psf(tel, band, scale_arcsec, radius_arcsec, seed, pixel_integrated,
                   field_zernike_nm, segment_terms_nm)
    if not store:
        return psf
    with atomic_path(path) as tmp, open(tmp, "wb") as fh:
        np.savez(fh, image=psf.image, scale_arcsec=psf.scale_arcsec, band=psf.band,
                 pivot_nm=psf.pivot_nm, fwhm_arcsec=psf.fwhm_arcsec,
                 ee_radii_arcsec=psf.ee_radii_arcsec, ee_values=psf.ee_values,
                 strehl=psf.strehl, flux_fraction=psf.flux_fraction, key=key)
    return psf


# --------------------------------------------------------------------------------------------
# picture
# --------------------------------------------------------------------------------------------
def write_psf_png(psfs: Sequence[PSFImage], pupil: Pupil, path: str | os.PathLike,
                  dynamic_range: float = 1e7, roll_deg: float = 0.0,
                  seed: int | None = None, corner_pupil: tuple[str, Pupil] | None = None,
                  field_panels: Sequence[tuple[str, np.ndarray, float]] = ()) -> Path:
    """PNG of the pupil amplitude, its wavefront error ("flat" when zero) and each PSF on a log
    stretch, with a scale bar and N/E arrows for a mosaic of roll ``roll_deg``; with a
    field-dependent PSF also the wavefront at a field corner (``corner_pupil``: title, pupil)
    and ``field_panels`` (title, PSF image, pixel in arcsec), e.g. the core PSF at the field
    centre and at that corner.

    Parameters
    ----------
    psfs : sequence of PSFImage
    pupil : Pupil
    path : path
        Output file (written to a temporary name, then renamed).
    dynamic_range : float
        The stretch spans peak / dynamic_range .. peak.
    roll_deg : float (deg)
        Roll of the mosaic grid the PSFs are drawn on (its +y east of north).
    seed : int, optional
        The run's seed, for the title.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from .._plot import compass, roll_directions, scale_bar

    first = 2 + (corner_pupil is not None)
    n = len(psfs) + first + len(field_panels)
    ncol = min(n, 3)
    nrow = int(np.ceil(n / ncol))
    fig = Figure(figsize=(4.8 * ncol, 4.0 * nrow))
    FigureCanvasAgg(fig)
    fig.suptitle("pupil, wavefront and PSFs" + (f", seed {seed}" if seed is not None else ""))
    ax = fig.add_subplot(nrow, ncol, 1)
    h = pupil.size * pupil.scale_m / 2.0
    ax.imshow(pupil.amplitude, origin="lower", cmap="gray", extent=(-h, h, -h, h),
              vmin=0, vmax=1)
    ax.set_title(f"pupil, clear area {pupil.area_m2:.2f} m$^2$")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    panels = [("", pupil)] + ([corner_pupil] if corner_pupil is not None else [])
    for k, (where, pup) in enumerate(panels):
        ax = fig.add_subplot(nrow, ncol, 2 + k)
        opd = np.where(pup.amplitude > 0.5, pup.opd_nm, np.nan)
        im = ax.imshow(opd, origin="lower", cmap="RdBu_r", extent=(-h, h, -h, h))
        ax.set_title(f"wavefront error{where}, rms {pup.rms_wfe_nm:.1f} nm"
                     if np.any(pup.opd_nm) else "wavefront error: flat (0 nm)")
        ax.set_xlabel("x (m)")
        ax.set_ylabel("y (m)")
        fig.colorbar(im, ax=ax, label="OPD (nm)", shrink=0.8)
    north, east = roll_directions(roll_deg)
    for i, p in enumerate(psfs):
        ax = fig.add_subplot(nrow, ncol, i + 1 + first)
        r = p.radius_arcsec
        peak = p.image.max()
        im = ax.imshow(np.log10(np.maximum(p.image, peak / dynamic_range * 1e-3) / peak),
                       origin="lower", cmap="magma", extent=(-r, r, -r, r),
                       vmin=-np.log10(dynamic_range), vmax=0)
        ax.set_title(f"{p.band}: FWHM {p.fwhm_arcsec:.3f}\", Strehl {p.strehl:.2f}")
        ax.set_xlabel("x (arcsec, mosaic axis)")
        ax.set_ylabel("y (arcsec, mosaic axis)")
        bar = float(f"{r / 2:.0g}")
        scale_bar(ax, bar, f'{bar:g}"')
        compass(ax, north, east)
        fig.colorbar(im, ax=ax, label="log10(pixel / peak)", shrink=0.8)
    for i, (title, img, sc_arcsec) in enumerate(field_panels):
        ax = fig.add_subplot(nrow, ncol, first + len(psfs) + i + 1)
        r = img.shape[0] / 2.0 * sc_arcsec
        peak = img.max()
        im = ax.imshow(np.log10(np.maximum(img, peak * 1e-4) / peak), origin="lower",
                       cmap="magma", extent=(-r, r, -r, r), vmin=-4, vmax=0)
        ax.set_title(title)
        ax.set_xlabel("x (arcsec, scene axis)")
        ax.set_ylabel("y (arcsec, scene axis)")
        bar = float(f"{r / 2:.0g}")
        scale_bar(ax, bar, f'{bar:g}"')
        fig.colorbar(im, ax=ax, label="log10(pixel / peak)", shrink=0.8)
    fig.tight_layout()
    path = Path(path)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    return path


def cached_psf_png(tel: TelescopeConfig, psfs: Sequence[PSFImage], seed: int,
                   path: str | os.PathLike, cache_dir: str | os.PathLike | None = None,
                   pupil_grid: int = 512, roll_deg: float = 0.0, field: Sequence = ()) -> Path:
    """:func:`write_psf_png` of ``psfs`` and the scenario's pupil, kept in the PSF disk cache.

    Drawing the picture takes seconds (matplotlib), longer than a small run's optics; the
    cached copy is named by a SHA-256 of the PSF images and what they are titled with, the
    pupil settings, ``seed``, ``pupil_grid``, ``roll_deg`` (deg, the mosaic's roll that orients
    the N/E arrows) and the code version, and copied to ``path``
    (through a temporary name, so a killed run leaves no partial file).

    ``field``: (band, :class:`simfield.optics.field.FieldPSF`, (u, v), (half_w, half_h)) per
    field panel (arcsec): the model's PSF at (u, v) is drawn with its FWHM and ellipticity,
    and the wavefront at the last panel's position (the corner) beside the centre's.
    """
    import shutil

    from .field import field_zernike, psf_shape
    from .pupil import with_zernike

    panels, corner = [], None
    for band, fm, (u, v), (hw, hh) in field:
        img = fm.at(u, v)
        fw, e = psf_shape(img, fm.scale_arcsec)
        panels.append((f'{band} core at field ({u:+.0f}", {v:+.0f}"): FWHM {fw:.3f}", e {e:.2f}',
                       img, fm.scale_arcsec))
        corner = (u, v, hw, hh)

    h = hashlib.sha256(json.dumps({"version": _CACHE_VERSION, "picture": _PICTURE_VERSION,
                                   "roll_deg": float(roll_deg),
                                   "pupil": dataclasses.asdict(tel.pupil), "seed": int(seed),
                                   "grid": int(pupil_grid)}, sort_keys=True,
                                  default=str).encode())
    for p in psfs:
        h.update(f"{p.band} {p.fwhm_arcsec:.6g} {p.strehl:.6g} {p.scale_arcsec!r}".encode())
        h.update(np.ascontiguousarray(p.image).tobytes())
    for title, img, _ in panels:
        h.update(title.encode())
        h.update(np.ascontiguousarray(img).tobytes())
    if corner is not None:
        h.update(repr((corner, dataclasses.asdict(tel.field_psf))).encode())
    cached = Path(cache_dir if cache_dir is not None else tel.psf.cache_dir) / \
        f"psf_picture_{h.hexdigest()[:20]}.png"
    if not cached.exists():
        pupil = scenario_pupil(tel, seed, grid_size=pupil_grid)
        cp = None
        if corner is not None:
            u, v, hw, hh = corner
            cp = (f' at ({u:+.0f}", {v:+.0f}")',
                  with_zernike(pupil, field_zernike(tel, u, v, hw, hh), tel.diameter_m / 2))
        write_psf_png(psfs, pupil, cached, roll_deg=roll_deg, seed=seed, corner_pupil=cp,
                      field_panels=panels)
    path = Path(path)
    with atomic_path(path) as tmp:
        shutil.copyfile(cached, tmp)
    return path
