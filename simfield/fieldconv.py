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

from .grid import Grid
from .scene import Stamp, add_bright, convolve_weighted

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
    return convolve_weighted(image, mean, modes, weights, tile, workers)


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
    cx, cy = sgrid.center_pixel

    def delta(st: Stamp) -> np.ndarray:
        sy = st.iy0 + (st.image.shape[0] - 1) / 2.0
        sx = st.ix0 + (st.image.shape[1] - 1) / 2.0
        return psf_at((sx - cx) * sgrid.scale, (sy - cy) * sgrid.scale) - core

    add_bright(scene, stamps, rate, bright, wide, origin=origin, bulge_fraction=bulge_fraction,
               delta=delta)
