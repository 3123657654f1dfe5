"""Detector readout beyond white noise: correlated (1/f) read noise of several outputs,
reference pixels and their correction (see the modules: layout, pink, correlated, refpix,
exposure)."""

from .correlated import CorrelatedNoise
from .exposure import ExposureReadout, apply_readout, readout_for
from .layout import ReadoutLayout
from .pink import pink_coefficient, pink_psd, pink_rows
from .refpix import RefCorrection, reference_mask

__all__ = ["CorrelatedNoise", "ExposureReadout", "apply_readout", "readout_for",
           "ReadoutLayout", "pink_coefficient", "pink_psd", "pink_rows", "RefCorrection",
           "reference_mask"]
