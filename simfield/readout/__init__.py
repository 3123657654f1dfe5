"""Detector readout beyond white noise: correlated (1/f) read noise of several outputs,
reference pixels and their correction, persistence (see the modules: layout, pink,
correlated, refpix, exposure, persistence)."""

from .correlated import CorrelatedNoise
from .exposure import ExposureReadout, apply_readout, readout_for
from .layout import ReadoutLayout
from .persistence import (DQ_PERSISTENCE, Stimulus, apply_persistence, find_stimuli,
                          persistence_window)
from .pink import pink_coefficient, pink_psd, pink_rows
from .refpix import RefCorrection, reference_mask

__all__ = ["CorrelatedNoise", "ExposureReadout", "apply_readout", "readout_for",
           "ReadoutLayout", "pink_coefficient", "pink_psd", "pink_rows", "RefCorrection",
           "reference_mask", "DQ_PERSISTENCE", "Stimulus", "apply_persistence", "find_stimuli",
           "persistence_window"]
