"""Forced multi-band photometry of the detections, from a run's written files.

Beside ``score/``: it reads ``detections_<band>.fits``, ``mosaic_<band>.fits`` and
``psf_<band>.fits`` and writes ``photometry.fits`` (HDU ``PHOTOMETRY``), importing no stage.
Every band is measured in native apertures (corrected to total by its own encircled energy)
and in apertures on its mosaic convolved to the broadest PSF (corrected by that PSF's
encircled energy; these give the colours). Errors are honest for correlated pixels: the
native ones take the mosaic's aperture noise factor, the matched ones also the noise
correlation the matching kernel adds (:mod:`.kernels`).
"""

from .catalog import (PSFInfo, check_match_target, measure_catalog, measure_run, read_psf,
                      target_band)
from .forced import ApertureSums, aperture_sums
from .kernels import aperture_weights, matched_noise_ratio, matching_kernel, resample_kernel

__all__ = ["measure_run", "measure_catalog", "read_psf", "target_band", "check_match_target",
           "PSFInfo", "aperture_sums", "ApertureSums", "matching_kernel", "resample_kernel",
           "aperture_weights", "matched_noise_ratio"]
