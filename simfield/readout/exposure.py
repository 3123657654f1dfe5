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

from .correlated import CorrelatedNoise
from .layout import ReadoutLayout
from .pink import pink_coefficient, pink_variance
from .refpix import RefCorrection, reference_mask

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
        """What the correlated noise leaves in the calibrated slope (e-/s), float32."""
        r = self.noise.window(y0, y1, x0, x1)
        if self.correction is not None:
            r -= self.correction.window(y0, y1, x0, x1)
        return (self.slope_per_frame * r).astype(np.float32)

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
                white) -> ExposureReadout:
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
    """
    lay = ReadoutLayout(tuple(int(s) for s in shape), int(det.n_channels),
                        int(det.row_overhead_pix), float(det.pixel_time_us) * 1e-6)
    noise = CorrelatedNoise(lay, int(seed), ("readout", band, int(k)), float(det.pink_common_e),
                            float(det.pink_channel_e), float(det.channel_offset_e))
    corr = RefCorrection(noise, white, det.reference_pixels, det.refpix_half_rows) \
        if det.refpix_correction else None
    return ExposureReadout(noise, corr, int(det.reference_pixels), float(slope_per_frame))


def apply_readout(e, ro: ExposureReadout, box: tuple):
    """Exposure ``e`` (window ``box`` = (y0, y1, x0, x1) of its detector) with the
    correlated noise and the correction added, and the variances updated (a new Exposure)."""
    y0, y1, x0, x1 = box
    res = ro.residual(y0, y1, x0, x1)
    v = np.float32(ro.pixel_variance())
    var_sky = np.array(e.var_sky, np.float32) + v
    ref = reference_mask(ro.noise.layout.shape, ro.n_ref, y0, y1, x0, x1)
    var_sky[ref] = 0.0
    return dataclasses.replace(e, sci=e.sci + res, var=e.var + v, var_sky=var_sky, stripes=res)
