"""Forced circular-aperture sums on a written mosaic, native and PSF-matched, block by block.

The mosaic is read in square blocks of ``block`` pixels (memory maps: only a block's pages
are read, so memory grows with the block, not the field). Each block is read with a margin of
the kernel's half-size plus the aperture radius, convolved with the matching kernel (zero
beyond the mosaic's edges, as for a convolution of the whole mosaic), and the apertures of the
positions whose nearest pixel lies in the block are summed on the native and the convolved
pixels. Every aperture thus sees exactly the pixels a whole-mosaic convolution would give it,
so the result does not depend on the block size nor on how the mosaic was made (up to
floating-point rounding of the FFTs).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.io import fits
from photutils.aperture import CircularAperture
from scipy import signal

__all__ = ["ApertureSums", "aperture_sums"]

#: side of the blocks the mosaic is read and convolved in (mosaic pixels)
BLOCK_PIXELS = 1024


@dataclass(frozen=True, eq=False)
class ApertureSums:
    """Aperture sums of one band at the forced positions.

    Attributes
    ----------
    native : ndarray (e-/s)
        Sum over the aperture of ``IMAGE``.
    matched : ndarray (e-/s)
        Sum over the aperture of ``IMAGE`` convolved with the matching kernel.
    var : ndarray ((e-/s)^2)
        Sum over the aperture of 1 / ``INVVAR`` (pixels without data count 0).
    flags : ndarray (int32)
        OR of ``FLAGS`` over the pixels the aperture touches.
    """

    native: np.ndarray
    matched: np.ndarray
    var: np.ndarray
    flags: np.ndarray


def _sums(masks, data, slices):
    return np.array([0.0 if big is None else float(np.sum(data[big] * m.data[small]))
                     for m, (big, small) in zip(masks, slices)])


def aperture_sums(path, x, y, radius_pix: float, kernel: np.ndarray | None,
                  block: int = BLOCK_PIXELS) -> ApertureSums:
    """Native and matched aperture sums at (x, y) on the mosaic file ``path``.

    Parameters
    ----------
    path : path of a ``mosaic_<band>.fits`` (``IMAGE`` e-/s, ``INVVAR`` (e-/s)^-2, ``FLAGS``)
    x, y : ndarray (pix)
        0-based mosaic positions (first pixel centred on 0).
    radius_pix : float (mosaic pixels)
    kernel : ndarray (dimensionless) or None
        Matching kernel on the mosaic pixel (odd square); None: the band is the target, matched
        = native.
    block : int (pixels)
        Side of the blocks read at a time.
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    n = x.size
    out = {k: np.zeros(n) for k in ("native", "matched", "var")}
    flags = np.zeros(n, np.int32)
    hk = 0 if kernel is None else kernel.shape[0] // 2
    ra = int(np.ceil(radius_pix)) + 1
    with fits.open(path, memmap=True) as hl:
        ny, nx = hl["IMAGE"].shape
        ix = np.clip(np.floor(x + 0.5).astype(int), 0, nx - 1) // block
        iy = np.clip(np.floor(y + 0.5).astype(int), 0, ny - 1) // block
        for by, bx in sorted(set(zip(iy.tolist(), ix.tolist()))):
            sel = np.flatnonzero((iy == by) & (ix == bx))
            pad = ra + hk
            y0, x0 = max(by * block - pad, 0), max(bx * block - pad, 0)
            y1, x1 = min((by + 1) * block + pad, ny), min((bx + 1) * block + pad, nx)
            win = (slice(y0, y1), slice(x0, x1))
            img = np.nan_to_num(hl["IMAGE"].data[win].astype(float))
            wht = hl["INVVAR"].data[win].astype(float)
            var = np.where(wht > 0, 1.0 / np.where(wht > 0, wht, 1.0), 0.0)
            flg = hl["FLAGS"].data[win].astype(np.int32)
            masks = CircularAperture(np.column_stack([x[sel] - x0, y[sel] - y0]),
                                     radius_pix).to_mask(method="exact")
            slices = [m.get_overlap_slices(img.shape) for m in masks]
            out["native"][sel] = _sums(masks, img, slices)
            out["var"][sel] = _sums(masks, var, slices)
            if kernel is None:
                out["matched"][sel] = out["native"][sel]
            else:
                conv = signal.fftconvolve(img, kernel, mode="same")
                out["matched"][sel] = _sums(masks, conv, slices)
            for j, m, (big, small) in zip(sel, masks, slices):
                if big is not None:
                    flags[j] = np.bitwise_or.reduce(flg[big][m.data[small] > 0], initial=0)
    return ApertureSums(out["native"], out["matched"], out["var"], flags)
