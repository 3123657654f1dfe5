"""Persistence: charge trapped by pixels that saw a high fluence, released into later exposures.

A pixel whose fluence F (e-) in an exposure exceeds the onset F_0 traps charge in proportion
to the excess E = min(F, full well) - F_0 and releases it afterwards as a sum of exponentials,
current I(t) = E sum_i f_i / tau_i exp(-t / tau_i) at a time t after the end of that exposure
(the form used to describe infrared-array persistence, e.g. Smith et al. 2008, Proc. SPIE
7021 [from memory]; the fractions and time constants in conf/detector/hgcdte.yaml, [0.002,
0.001] and [300 s, 3000 s], and the onset are demo values, not a measured device). A later
exposure that starts t_a after that end and lasts T collects Q = E sum_i f_i (exp(-t_a /
tau_i) - exp(-(t_a + T) / tau_i)) in the same detector pixel, which its slope fit sees here as
the mean current Q / T (an approximation: the fit weights the ramp's middle more, and a
decaying current bends the ramp).

Exposures are taken band after band, in each band in dither order (the order of
:func:`simfield.survey.exposure_grids`), ``exposure_gap_s`` apart; exposure s (0-based in
that order) ends at (s + 1) T + s gap. The stimuli are the point sources whose peak fluence
exceeds the onset: their fluence on the detector pixels around them is the band's PSF
integrated over detector pixels, centred on the pixel the source falls on (sub-pixel phase
left out), so only a few pixels per bright star are followed (cheap; no whole-detector maps).
A reduction that knows where bright sources fell flags the pixels (``DQ_PERSISTENCE``) and
leaves them out of the mosaic; one that does not leaves the ghosts in.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

__all__ = ["DQ_PERSISTENCE", "Stimulus", "find_stimuli", "persistence_window",
           "apply_persistence"]

#: Exposure DQ bit: persistence predicted from earlier exposures (flagged: left out).
DQ_PERSISTENCE = 128


@dataclass(frozen=True)
class Stimulus:
    """Trapped charge of a bright source in one exposure.

    Attributes
    ----------
    seq : int
        Index of the exposure in time order.
    y0, x0 : int (detector pixels)
        Corner of ``excess`` on the detector.
    excess : ndarray (e-)
        min(fluence, full well) - onset, >= 0, per detector pixel.
    """

    seq: int
    y0: int
    x0: int
    excess: np.ndarray


def find_stimuli(seq: int, x: np.ndarray, y: np.ndarray, rate: np.ndarray, stamp: np.ndarray,
                 duration_s: float, onset_e: float, full_well_e: float) -> list[Stimulus]:
    """Stimuli of one exposure.

    Parameters
    ----------
    seq : int
        The exposure's index in time order.
    x, y : ndarray (detector pixels)
        Positions of the point sources on the exposure's detector grid.
    rate : ndarray (e-/s)
        Their total count rates in the exposure's band.
    stamp : ndarray, odd square (dimensionless)
        The band's PSF integrated over detector pixels, centred (fraction of the flux per pixel).
    duration_s : float (s)
        Ramp duration.
    onset_e, full_well_e : float (e-)
    """
    h = stamp.shape[0] // 2
    peak = rate * duration_s * float(stamp.max())
    out = []
    for i in np.flatnonzero(peak > onset_e):
        flu = rate[i] * duration_s * stamp
        exc = np.clip(np.minimum(flu, full_well_e) - onset_e, 0.0, None)
        ix, iy = int(np.floor(x[i] + 0.5)), int(np.floor(y[i] + 0.5))
        out.append(Stimulus(int(seq), iy - h, ix - h, exc.astype(np.float32)))
    return out


def persistence_window(stimuli: list[Stimulus], seq: int, duration_s: float, gap_s: float,
                       fractions, taus_s, box: tuple) -> np.ndarray:
    """Persistence current (e-/s, float32) in exposure ``seq`` on detector window ``box`` =
    (y0, y1, x0, x1): the mean over its ramp of the charge released by every earlier stimulus."""
    y0, y1, x0, x1 = box
    out = np.zeros((y1 - y0, x1 - x0), np.float32)
    f = np.asarray(fractions, float)
    tau = np.asarray(taus_s, float)
    for s in stimuli:
        if s.seq >= seq:
            continue
        t_a = (seq - s.seq - 1) * (duration_s + gap_s) + gap_s
        q = float(np.sum(f * (np.exp(-t_a / tau) - np.exp(-(t_a + duration_s) / tau))))
        ny, nx = s.excess.shape
        ya, yb = max(y0, s.y0), min(y1, s.y0 + ny)
        xa, xb = max(x0, s.x0), min(x1, s.x0 + nx)
        if yb > ya and xb > xa:
            out[ya - y0:yb - y0, xa - x0:xb - x0] += \
                (q / duration_s) * s.excess[ya - s.y0:yb - s.y0, xa - s.x0:xb - s.x0]
    return out


def apply_persistence(e, ghost: np.ndarray, flagged: bool):
    """Exposure ``e`` with the persistence current ``ghost`` (e-/s) added; with ``flagged``
    the pixels that have any are flagged ``DQ_PERSISTENCE`` and left out of the mosaic
    (``var_sky`` = 0, as for the other pixels the reduction knows to be bad)."""
    hit = ghost > 0
    if not hit.any():
        return dataclasses.replace(e, persistence=ghost)
    dq, var_sky = e.dq, e.var_sky
    if flagged:
        dq = np.where(hit, dq | DQ_PERSISTENCE, dq).astype(dq.dtype)
        var_sky = np.where(hit, np.float32(0.0), var_sky).astype(np.float32)
    return dataclasses.replace(e, sci=e.sci + ghost, dq=dq, var_sky=var_sky, persistence=ghost)
