"""The readout stage as the pipeline applies it to each exposure window.

:mod:`simfield.readout` knows correlated read noise, reference pixels, non-linearity and
persistence as plain functions; :mod:`simfield.detector` knows the ramp (frame time, slope
weights, the pixel-tied white read noise). Joining them needs both stages and the scenario, so
it lives here, on the pipeline's side of the import rule (stages do not import each other),
and only :mod:`simfield.pipeline` calls it. Units: e-/s (exposure pixels), e- (fluences and
frame read noise), s (times), detector pixels (boxes ``(y0, y1, x0, x1)``).
"""

from __future__ import annotations

import numpy as np
from astropy.table import Table

from .columns import POINT_KINDS
from .config import Scenario, frame_read_noise_e
from .detector import PixelNoise, frame_time, slope_variance_factors, slope_weights
from .grid import Grid
from .optics.psf import effective_psf
from .random import stream
from .readout import (apply_persistence, apply_readout, find_stimuli, persistence_window,
                      readout_for)
from .readout.nonlinearity import ramp_weights, window_bias
from .survey import drizzle_field_covariance

__all__ = ["readout_model", "correlated_readout", "exposure_order", "ramp_duration",
           "persistence_stimuli", "nonlinearity", "persistence", "readout_covariance",
           "PERSISTENCE_HALF", "NONLINEARITY_MIN_FLUENCE_E", "READOUT_COV_LAGS",
           "READOUT_COV_REALISATIONS"]

#: Half side (detector pixels) of the PSF stamp followed for persistence around a source.
PERSISTENCE_HALF = 5

#: Ramps collecting less than this (e-) skip the non-linearity: its bias there is below
#: 1e-3 of the signal uncorrected and 1e-5 corrected (the default law, 5% at full well).
NONLINEARITY_MIN_FLUENCE_E = 1000.0

#: Lags (mosaic pixels) of the correlated read noise's covariance, so apertures up to 10
#: pixels in radius see all of it within them; realisations drizzled to measure it.
READOUT_COV_LAGS = 20
READOUT_COV_REALISATIONS = 8


def readout_model(sc: Scenario, band: str, k: int, shape, white=None):
    """Correlated read noise and reference-pixel correction of exposure ``k`` of ``band``
    (:func:`simfield.readout.readout_for`) on a detector of ``shape`` (pixels), with the
    detector's own white frame read noise (e-) at the reference pixels: the same pixel-tied
    deviates :func:`simfield.detector.expose` draws, or ``white(y0, y1, x0, x1)`` (unit
    normal deviates of that box) if given."""
    det = sc.detector
    a_full, _ = slope_variance_factors(det.n_groups, det.n_frames,
                                       frame_time(det, sc.survey.exposure_time_s))
    sig_f = np.sqrt(frame_read_noise_e(det) ** 2
                    + (det.gain_e_adu ** 2 / 12.0 if det.quantize else 0.0))

    def pixel_white(y0, y1, x0, x1):
        z = PixelNoise(sc.seed, ("exposure", band, k), y0, x0, (y1 - y0, x1 - x0)).normal("read")
        return z.astype(float)

    unit = pixel_white if white is None else white
    # the pixel-tied deviates are named by the exposure: windows share the estimates
    key = ("pixel", sc.seed, band, k, float(sig_f)) if white is None else None
    return readout_for(det, shape, sc.seed, band, k, float(np.sqrt(a_full)),
                       lambda *box: sig_f * unit(*box), key)


def correlated_readout(sc: Scenario, band: str, k: int, shape, e, box):
    """Exposure window ``e`` (an :class:`simfield.detector.Exposure`, e-/s) of exposure ``k``
    of ``band`` on the detector box ``box`` with the residual of the correlated read noise
    after the reference-pixel correction added (:func:`readout_model`; ``shape`` is the whole
    detector's, pixels)."""
    return apply_readout(e, readout_model(sc, band, k, shape), box)


def exposure_order(sc: Scenario, bands: list, b, k: int) -> int:
    """Index of exposure ``k`` of band ``b`` in time order: band after band, dither order."""
    return [x.name for x in bands].index(b.name) * sc.survey.n_exposures + k


def ramp_duration(sc: Scenario) -> float:
    """Ramp duration n_groups t_g (s) of an exposure of slope baseline exposure_time_s."""
    det = sc.detector
    return sc.survey.exposure_time_s * det.n_groups / (det.n_groups - 1)


def persistence_stimuli(sc: Scenario, bands: list, sources: Table, egrids: list[Grid],
                        psf_core: dict, rates: dict) -> list:
    """Bright point sources of every exposure whose peak fluence (e-) exceeds the onset
    (:func:`simfield.readout.find_stimuli`), with the band's PSF integrated over detector
    pixels (:func:`simfield.optics.psf.effective_psf`, sampled at detector pixel centres).

    ``psf_core``: band -> the core :class:`~simfield.optics.psf.PSFImage`; ``rates``: band ->
    e-/s per source row.
    """
    tel, det = sc.telescope, sc.detector
    point = np.isin(np.asarray(sources["kind"]).astype(str), POINT_KINDS)
    xs = np.asarray(sources["x_arcsec"], float)[point]
    ys = np.asarray(sources["y_arcsec"], float)[point]
    out = []
    for b in bands:
        eff = effective_psf(psf_core[b.name], tel.pixel_scale_arcsec)
        os_ = int(round(tel.pixel_scale_arcsec / eff.scale_arcsec))
        c, h = eff.image.shape[0] // 2, PERSISTENCE_HALF
        stamp = eff.image[c - h * os_:c + h * os_ + 1:os_, c - h * os_:c + h * os_ + 1:os_]
        stamp = np.asarray(stamp, float) * os_ * os_  # fraction of the flux per detector pixel
        for k, g in enumerate(egrids):
            x, y = g.offsets_to_pixel(xs, ys)
            out += find_stimuli(exposure_order(sc, bands, b, k), x, y,
                                np.asarray(rates[b.name], float)[point], stamp,
                                ramp_duration(sc), det.persistence_onset_e, det.full_well_e)
    return out


def nonlinearity(sc: Scenario, e, box):
    """Exposure window ``e`` (e-/s) on the detector box ``box`` with the slope bias of the
    non-linear ramp and its (imperfect) linearisation
    (:func:`simfield.readout.nonlinearity.window_bias`)."""
    det = sc.detector
    tf = frame_time(det, sc.survey.exposure_time_s)
    w = ramp_weights(slope_weights(det.n_groups, det.n_frames, tf), tf)
    return window_bias(e, sc.seed, box, det.nonlinearity_at_full_well / det.full_well_e,
                       det.nonlinearity_cal_rms, w, det.nonlinearity_correction,
                       ramp_duration(sc), NONLINEARITY_MIN_FLUENCE_E)


def persistence(sc: Scenario, stimuli: list, bands: list, b, k: int, e, box):
    """Exposure window ``e`` (e-/s) of exposure ``k`` of band ``b`` on the detector box
    ``box`` with the charge released by the earlier exposures' ``stimuli``
    (:func:`persistence_stimuli`), flagged instead if ``detector.persistence_flagged``."""
    det = sc.detector
    ghost = persistence_window(stimuli, exposure_order(sc, bands, b, k), ramp_duration(sc),
                               det.exposure_gap_s, det.persistence_fractions,
                               det.persistence_tau_s, box)
    return apply_persistence(e, ghost, det.persistence_flagged)


def readout_covariance(sc: Scenario, egrids: list[Grid], mgrid: Grid) -> np.ndarray:
    """Covariance ((e-/s)^2) of the mosaic at lags up to ``READOUT_COV_LAGS`` of what the
    correlated read noise leaves after the reference-pixel correction (:mod:`simfield.readout`),
    drizzled through the run's own exposure grids (the same for every band: its amplitudes are
    e- per frame). Realisations have streams of their own, apart from the exposures'."""
    srv = sc.survey

    def field(i, box, r):
        rng = stream(sc.seed, "readout_covariance", r, i)
        ro = readout_model(sc, f"cov{r}", i, egrids[i].shape,
                           white=lambda y0, y1, x0, x1: rng.standard_normal((y1 - y0, x1 - x0)))
        return ro.residual(*box)

    return drizzle_field_covariance(egrids, mgrid, srv.drizzle_kernel, srv.pixfrac, field,
                                    READOUT_COV_LAGS, READOUT_COV_REALISATIONS)
