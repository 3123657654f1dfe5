"""optics stage of simfield: rastered entrance pupil -> polychromatic band PSFs.

Units: pupil in m, wavefront error in nm, wavelengths in nm, angles in arcsec.
"""

from .psf import (
    PSFImage,
    band_psf,
    band_wavelengths,
    cached_band_psf,
    effective_psf,
    encircled_energy,
    measure_fwhm,
    monochromatic_psf,
    write_psf_png,
    cached_psf_png,
)
from .pupil import Pupil, make_pupil, pupil_extent_m, scenario_pupil, segment_centers

__all__ = [
    "Pupil",
    "make_pupil",
    "scenario_pupil",
    "pupil_extent_m",
    "segment_centers",
    "PSFImage",
    "monochromatic_psf",
    "band_wavelengths",
    "band_psf",
    "effective_psf",
    "cached_band_psf",
    "measure_fwhm",
    "encircled_energy",
    "write_psf_png",
    "cached_psf_png",
]
