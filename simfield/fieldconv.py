"""Convolution with a PSF that varies across the image, as a mean kernel plus weighted modes.

``out = image (x) mean + sum_k (image * weights[k]) (x) modes[k]``: each pixel's light is
spread by ``mean + sum_k weights[k][pixel] modes[k]``, the kernel at that pixel (the weights
are taken where the light comes from, not where it lands). With ``K`` modes this costs
``K + 1`` whole-image FFT convolutions (:func:`simfield.scene.convolve_tiled`), not one per
source. Units: whatever the image holds (e.g. e-/s per scene pixel); kernels and weights are
dimensionless.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from .scene import convolve_tiled

__all__ = ["convolve_modes"]


def convolve_modes(image: np.ndarray, mean: np.ndarray, modes: Sequence[np.ndarray],
                   weights: Sequence[np.ndarray]) -> np.ndarray:
    """``image (x) mean + sum_k (image * weights[k]) (x) modes[k]`` (``mode='same'``).

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
    mean : ndarray, odd shape
        The kernel common to every pixel.
    modes : sequence of ndarray, each the shape of ``mean``
    weights : sequence of ndarray, each the shape of ``image``
        The weight of each mode at each source pixel.
    """
    out = convolve_tiled(image, mean)
    for m, w in zip(modes, weights):
        out += convolve_tiled(image * w.astype(image.dtype, copy=False), m)
    return out
