"""The correlated read noise, reference pixels and their correction applied to one exposure.

:func:`readout_for` builds the pieces of one exposure (band, index) from the detector
configuration; :func:`apply_readout` adds the correlated noise to an exposure window made by
:func:`simfield.detector.expose`, subtracts the reference-pixel correction when it is on, and
tells the mosaic what remains: the exposure's ``var`` and ``var_sky`` grow by the pixel
variance of the correlated noise (in e-/s: its frame variance times sum_j c_j^2, like the
white read noise) and the reference pixels get ``var_sky`` = 0, so the drizzle leaves them out
(they see no light).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..pixelops import add_readout, pink_window
from .correlated import CorrelatedNoise
from .layout import ReadoutLayout
from .pink import STEP, pink_coefficient, pink_variance
from .refpix import RefCorrection

__all__ = ["ExposureReadout", "readout_for", "apply_readout"]


@dataclasses.dataclass
class ExposureReadout:
    """Correlated noise of one exposure and its correction.

    Attributes
    ----------
    noise : CorrelatedNoise
    correction : RefCorrection or None
        None: the reduction does not correct (the offsets stay in the image).
    n_ref : int
        Reference border (pixels).
    slope_per_frame : float (1/s)
        sqrt(sum_j c_j^2): e- of frame noise -> e-/s of fitted slope.
    """

    noise: CorrelatedNoise
    correction: RefCorrection | None
    n_ref: int
    slope_per_frame: float

    def residual(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        """What the correlated noise leaves in the calibrated slope (e-/s), float32: the
        noise (:meth:`CorrelatedNoise.window`) less the correction
        (:meth:`RefCorrection.window`), times ``slope_per_frame``, in one pass
        (:func:`simfield.pixelops.pink_window`)."""
        lay = self.noise.layout
        i0, c0, grids = self.noise.channel_grids(y0, y1, x0, x1)
        per_col = per_row = None
        if self.correction is not None:
            per_col, per_row = self.correction.parts(y0, y1, x0, x1)
        return pink_window(grids, c0, lay.width, lay.row_len, STEP, i0 * STEP, y0, x0,
                           (y1 - y0, x1 - x0), per_col, per_row, self.slope_per_frame)

    def pixel_variance(self) -> float:
        """Variance ((e-/s)^2) the correlated noise adds to a pixel: its pink parts as
        synthesised (:func:`simfield.readout.pink.pink_variance`), before the correction. The
        correction removes a little of it (the slowest common mode) and adds the noise of its
        estimates; the mosaic's noise table carries the residual's own covariance (its
        ``NOISECOR``), so this per-pixel figure matters only through its share of INVVAR."""
        n, lay = self.noise, self.noise.layout
        v = sum(pink_variance(lay, pink_coefficient(lay, s))
                for s in (n.pink_common_e, n.pink_channel_e))
        return self.slope_per_frame ** 2 * v


def readout_for(det, shape: tuple, seed: int, band: str, k: int, slope_per_frame: float,
                white, white_key=None) -> ExposureReadout:
    """The readout of exposure ``k`` of ``band`` on a detector of ``shape`` (ny, nx).

    Parameters
    ----------
    det : DetectorConfig
    shape : (ny, nx)
    seed : int
    band : str
    k : int
    slope_per_frame : float (1/s)
    white : callable (y0, y1, x0, x1) -> ndarray (e- per frame)
        The detector's white frame read noise on a window (for the reference pixels).
    white_key : hashable or None
        Names ``white``'s numbers (:class:`RefCorrection`'s ``key``): windows of one exposure
        then share the correction's estimates.
    """
    lay = ReadoutLayout(tuple(int(s) for s in shape), int(det.n_channels),
                        int(det.row_overhead_pix), float(det.pixel_time_us) * 1e-6)
    noise = CorrelatedNoise(lay, int(seed), ("readout", band, int(k)), float(det.pink_common_e),
                            float(det.pink_channel_e), float(det.channel_offset_e))
    corr = RefCorrection(noise, white, det.reference_pixels, det.refpix_half_rows,
                         white_key) \
        if det.refpix_correction else None
    return ExposureReadout(noise, corr, int(det.reference_pixels), float(slope_per_frame))


def apply_readout(e, ro: ExposureReadout, box: tuple):
    """Exposure ``e`` (window ``box`` = (y0, y1, x0, x1) of its detector) with the
    correlated noise and the correction added, and the variances updated (a new Exposure)."""
    y0, y1, x0, x1 = box
    res = ro.residual(y0, y1, x0, x1)
    # sci + res, var + v, var_sky + v and 0 on the reference pixels (reference_mask), fused
    sci, var, var_sky = add_readout(e.sci, e.var, e.var_sky, res, ro.pixel_variance(), y0, x0,
                                    ro.n_ref, ro.noise.layout.shape)
    return dataclasses.replace(e, sci=sci, var=var, var_sky=var_sky, stripes=res)
