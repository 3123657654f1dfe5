"""Non-linearity of the ramp and what its correction leaves.

The signal a pixel reports falls short of the charge it holds as the charge grows: S = Q (1 -
beta Q), a quadratic compression, with beta set by the deficit at full well, beta = d / FW
(common practice for infrared arrays; d = ``nonlinearity_at_full_well``, 0.05 by default, a
demo value). The reduction linearises every frame by inverting that law with its calibrated
coefficient beta_cal = beta (1 + epsilon), epsilon ~ N(0, ``nonlinearity_cal_rms``) fixed per
pixel: Q' = (1 - sqrt(1 - 4 beta_cal S)) / (2 beta_cal) = Q + (beta_cal - beta) Q^2 (1 + O(beta
Q)). (A truncated correction S + beta_cal S^2 would leave 2 beta^2 Q^3, more than a 2%
calibration error does near full well.) For a constant current f (e-/s), Q_j = f t_j at read j,
so the least-squares slope b = sum_j c_j Q'_j of the ramp gains, to first order in
beta_cal - beta (dQ/dbeta at fixed S is Q^2 / (1 - 2 beta Q)) and second in beta Q,

    delta b = (beta_cal - beta) f^2 (sum_j c_j t_j^2 + 2 beta f sum_j c_j t_j^3),

with c_j the slope weights of :func:`simfield.detector.slope_weights` (for equal groups,
sum c_j t_j^2 = twice the mean read time). Without the correction the slope is fitted to S
itself and loses beta f^2 sum_j c_j t_j^2 (a few per cent near full well). Groups dropped for saturation are
not followed here (their pixels are flagged and refitted by the detector). The rate f is
taken from the exposure's own calibrated slope (its noise is negligible where the term
matters, at high fluence).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..pixelops import above

__all__ = ["ramp_weights", "nonlinearity_bias", "apply_nonlinearity", "calibration_error",
           "window_bias"]


def ramp_weights(c: np.ndarray, t_frame_s: float) -> tuple[float, float]:
    """(sum_j c_j t_j^2 (s), sum_j c_j t_j^3 (s^2)) for slope weights ``c`` (1/s) of frames
    read at t_j = (j + 1) t_f."""
    t = (np.arange(np.size(c)) + 1.0) * t_frame_s
    c = np.asarray(c, float)
    return float(np.sum(c * t * t)), float(np.sum(c * t ** 3))


def nonlinearity_bias(rate: np.ndarray, beta: float, beta_cal, weights: tuple,
                      corrected: bool = True) -> np.ndarray:
    """Slope bias (e-/s, float32) of a ramp of current ``rate`` (e-/s).

    Parameters
    ----------
    rate : ndarray (e-/s)
    beta : float (1/e-)
    beta_cal : float or ndarray (1/e-)
        The reduction's coefficient.
    weights : (float, float) (s, s^2)
        :func:`ramp_weights`.
    corrected : bool
        False: the reduction does not linearise (beta_cal is ignored).
    """
    f = np.asarray(rate, float)
    w2, w3 = weights
    if not corrected:
        return (-beta * f * f * w2).astype(np.float32)
    return ((np.asarray(beta_cal, float) - beta) * f * f * (w2 + 2.0 * beta * f * w3)
            ).astype(np.float32)


def apply_nonlinearity(e, beta: float, beta_cal, weights: tuple, corrected: bool = True):
    """Exposure ``e`` with the slope bias of the non-linearity its correction leaves added
    (the rate from ``e.sci`` + ``e.sky``, at least 0)."""
    f = np.maximum(np.asarray(e.sci, float) + float(e.sky), 0.0)
    return dataclasses.replace(e, sci=e.sci + nonlinearity_bias(f, beta, beta_cal, weights,
                                                                corrected))


#: Side (pixels) of the detector blocks carrying the calibration error's deviates.
CAL_BLOCK = 128


def calibration_error(seed: int, y0: int, x0: int, idx: tuple) -> np.ndarray:
    """epsilon ~ N(0, 1) of the detector pixels ``idx`` (rows, columns of a window whose
    corner is detector pixel (y0, x0)): one stream per ``CAL_BLOCK`` block of the detector,
    ``(seed, "nonlinearity_cal", row, column)``, so every window and every exposure sees the
    same value at a pixel; only the blocks holding ``idx`` are drawn."""
    from ..random import stream

    ys, xs = np.asarray(idx[0]) + y0, np.asarray(idx[1]) + x0
    out = np.empty(ys.size)
    if ys.size == 0:
        return out
    by, bx = ys // CAL_BLOCK, xs // CAL_BLOCK
    key = by * (int(bx.max()) + 1) + bx  # the pixels grouped by block
    order = np.argsort(key, kind="stable")
    for sel in np.split(order, np.flatnonzero(np.diff(key[order])) + 1):
        b = (int(by[sel[0]]), int(bx[sel[0]]))
        ry, rx = ys[sel] - b[0] * CAL_BLOCK, xs[sel] - b[1] * CAL_BLOCK
        # a block's deviates fill it row by row: its first rows, up to the last one asked
        # for, are the whole block's
        blk = stream(seed, "nonlinearity_cal", *b).standard_normal((int(ry.max()) + 1,
                                                                    CAL_BLOCK))
        out[sel] = blk[ry, rx]
    return out


def window_bias(e, seed: int, box: tuple, beta: float, cal_rms: float, weights: tuple,
                corrected: bool, fluence_s: float, min_fluence_e: float):
    """Exposure ``e`` (window ``box`` of its detector) with the non-linearity's slope bias added
    where the ramp collects more than ``min_fluence_e`` (elsewhere it is below 1e-4 of the
    signal for the default law); ``fluence_s`` is the ramp duration (s)."""
    # f = max(sci + sky, 0) (float64) where f fluence_s > min_fluence_e, in one pass
    idx, f = above(e.sci, float(e.sky), fluence_s, min_fluence_e)
    if idx[0].size == 0:
        return e
    beta_cal = beta * (1.0 + cal_rms * calibration_error(seed, box[0], box[2], idx))
    sci = np.array(e.sci, np.float32)
    sci[idx] += nonlinearity_bias(f, beta, beta_cal, weights, corrected)
    return dataclasses.replace(e, sci=sci)
