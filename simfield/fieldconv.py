"""Convolution with a PSF that varies across the image, as a mean kernel plus weighted modes.

``out = image (x) mean + sum_k (image * weights[k]) (x) modes[k]``: each pixel's light is
spread by ``mean + sum_k weights[k][pixel] modes[k]``, the kernel at that pixel (the weights
are taken where the light comes from, not where it lands). With ``K`` modes this costs
``K + 1`` forward FFTs and one inverse per tile of the image, not one convolution per
source. Units: whatever the image holds (e.g. e-/s per scene pixel); kernels and weights are
dimensionless.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

import scipy.fft as sfft

from .grid import Grid
from .scene import Stamp, _kernel_transform, _tiling, add_bright, convolve_tiled

__all__ = ["convolve_modes", "field_axes", "add_bright_field"]


def convolve_modes(image: np.ndarray, mean: np.ndarray, modes: Sequence[np.ndarray],
                   weights: Sequence[np.ndarray], tile: int = 2048,
                   workers: int = -1) -> np.ndarray:
    """``image (x) mean + sum_k (image * weights[k]) (x) modes[k]`` (``mode='same'``).

    By FFT overlap-add in tiles, as :func:`simfield.scene.convolve_tiled` (same tiling, same
    cached kernel transforms, flux spread past the edge lost), but the ``K + 1`` products of
    a tile are summed in the frequency domain and transformed back once: ``K + 1`` forward
    transforms and one inverse per tile instead of ``K + 1`` of each. The weighted images are
    formed per tile. Equal to the sum of separate convolutions to float32 round-off (~1e-7 of
    the peak; tests/test_field_psf.py).

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
    mean : ndarray, odd shape
        The kernel common to every pixel.
    modes : sequence of ndarray, each the shape of ``mean``
    weights : sequence of ndarray, each the shape of ``image``
        The weight of each mode at each source pixel.
    """
    ky, kx = mean.shape
    if ky % 2 == 0 or kx % 2 == 0:
        raise ValueError(f"kernel must have odd dimensions, got {mean.shape}")
    hy, hx = ky // 2, kx // 2
    ny, nx = image.shape
    ty, fy = _tiling(ny, ky, tile)
    tx, fx = _tiling(nx, kx, tile)
    real = np.float32 if image.dtype == np.float32 else np.float64
    kfs = [_kernel_transform(k, real, (fy, fx), workers) for k in (mean, *modes)]
    out = np.zeros((ny, nx), dtype=image.dtype)
    for y0 in range(0, ny, ty):
        for x0 in range(0, nx, tx):
            t = image[y0:y0 + ty, x0:x0 + tx]
            if not t.any():
                continue
            spec = sfft.rfft2(t, s=(fy, fx), workers=workers)
            spec *= kfs[0]
            for kf, w in zip(kfs[1:], weights):
                tw = t * w[y0:y0 + ty, x0:x0 + tx].astype(image.dtype, copy=False)
                part = sfft.rfft2(tw, s=(fy, fx), workers=workers)
                part *= kf
                spec += part
            h, wd = t.shape
            oy0, ox0 = max(y0 - hy, 0), max(x0 - hx, 0)
            oy1, ox1 = min(y0 + h + hy, ny), min(x0 + wd + hx, nx)
            rows = sfft.ifft(spec, axis=0, workers=workers, overwrite_x=True)[
                oy0 - y0 + hy:oy1 - y0 + hy]
            c = sfft.irfft(rows, n=fx, axis=1, workers=workers)
            out[oy0:oy1, ox0:ox1] += c[:, ox0 - x0 + hx:ox1 - x0 + hx]
    return out


def field_axes(sgrid: Grid, box) -> tuple[np.ndarray, np.ndarray]:
    """Field positions (arcsec) of the columns and rows of the scene window ``box`` = (y0, y1,
    x0, x1): along the north-up scene grid's x and y from its centre, the tangent point."""
    cx, cy = sgrid.center_pixel
    return ((np.arange(box[2], box[3]) - cx) * sgrid.scale,
            (np.arange(box[0], box[1]) - cy) * sgrid.scale)


def add_bright_field(scene: np.ndarray, stamps: Sequence[Stamp], rate: np.ndarray,
                     bright: np.ndarray, wide: np.ndarray, core: np.ndarray,
                     psf_at: Callable[[float, float], np.ndarray], sgrid: Grid, origin,
                     bulge_fraction: np.ndarray | None = None) -> None:
    """Add the bright sources to ``scene`` (e-/s per scene pixel, in place), each with the
    large PSF ``wide`` of the field centre plus, in its core, the difference between the
    field's PSF at the source and the centre's ``core`` (both dimensionless, odd shapes).

    ``psf_at(u, v)`` gives the core PSF at field position (u, v), arcsec along the scene
    grid's x and y from its centre (:meth:`simfield.optics.field.FieldPSF.at`), taken at each
    stamp's centre. ``rate`` (e-/s per source row), ``bright`` (bool per row), ``origin`` and
    ``bulge_fraction`` are as for :func:`simfield.scene.add_bright`.
    """
    hw, hc = wide.shape[0] // 2, core.shape[0] // 2
    cx, cy = sgrid.center_pixel
    for st in stamps:
        if not bright[st.index] or rate[st.index] == 0:
            continue
        sy = st.iy0 + (st.image.shape[0] - 1) / 2.0
        sx = st.ix0 + (st.image.shape[1] - 1) / 2.0
        k = wide.copy()
        k[hw - hc:hw + hc + 1, hw - hc:hw + hc + 1] += (
            psf_at((sx - cx) * sgrid.scale, (sy - cy) * sgrid.scale) - core)
        one = np.zeros_like(bright)
        one[st.index] = True
        add_bright(scene, [st], rate, one, k, origin=origin, bulge_fraction=bulge_fraction)
