"""Dither pattern, exposure grids, sampling of the scene on detector pixels, drizzled mosaics
and depths.

Every grid shares the field centre (``survey.ra_deg``, ``survey.dec_deg``) as tangent point, so
a dither is a shift ``(xi0, eta0)`` of the detector grid on the tangent plane and every mapping
between grids is affine (exact for a TAN WCS with a common tangent point). A real pointing
offset would also move the tangent point; over a field of a few arcmin the difference is far
below a milliarcsecond and is neglected (common practice for small fields).

Grids (see :mod:`simfield.grid` for the pixel convention, 0-based, centre of pixel (0, 0) at
``x = y = 0``):

- scene grid: ``telescope.pixel_scale_arcsec / survey.scene_oversample`` per pixel, north up,
  covering the field plus every detector pixel of every dither;
- exposure grids: one per exposure, detector pixels (``telescope.pixel_scale_arcsec``), rolled by
  ``survey.roll_deg``, each covering the whole field;
- mosaic grid: ``survey.mosaic_pixel_arcsec``, north up, exactly the field.

Images are in e-/s per pixel of their grid. The exposure flag bits (the same values as
:mod:`simfield.detector`, checked in the tests) are the constants ``DQ_*``; the mosaic's own
flags, which say what each mosaic pixel rests on, are ``MOSAIC_*``.
"""

from .depth import (MIN_EMPTY_APERTURES, aperture_sums, depth_from_sums, empty_apertures,
                    measured_depth, predicted_depth, ramp_variance_rauscher, robust_sigma)
from .noise import (APERTURE_RADII_PIX, NoiseCorrelation, drizzle_field_covariance,
                    drizzle_noise_covariance, noise_correlation)
from .drizzle import (DQ_BAD_NEIGHBOUR, DQ_COSMIC_RAY, DQ_DEAD, DQ_EXCLUDE, DQ_HOT, DQ_NO_SLOPE,
                      DQ_SATURATED, MOSAIC_CR_ONLY, MOSAIC_FEW_EXPOSURES, MOSAIC_NO_DATA,
                      MOSAIC_SATURATED, Mosaic, drizzle_mosaic, flag_header_cards, mosaic_hdus)
from .grids import (dither_offsets, exposure_grids, mosaic_grid, sample_scene, scene_grid)
from .tiles import Tile, owned_pixels, plan_tiles


__all__ = [
    "DQ_HOT",
    "DQ_DEAD",
    "DQ_COSMIC_RAY",
    "DQ_SATURATED",
    "DQ_NO_SLOPE",
    "DQ_BAD_NEIGHBOUR",
    "DQ_EXCLUDE",
    "MOSAIC_NO_DATA",
    "MOSAIC_FEW_EXPOSURES",
    "MOSAIC_SATURATED",
    "MOSAIC_CR_ONLY",
    "flag_header_cards",
    "Mosaic",
    "scene_grid",
    "mosaic_grid",
    "dither_offsets",
    "exposure_grids",
    "sample_scene",
    "drizzle_mosaic",
    "mosaic_hdus",
    "ramp_variance_rauscher",
    "predicted_depth",
    "measured_depth",
    "aperture_sums",
    "depth_from_sums",
    "empty_apertures",
    "robust_sigma",
    "NoiseCorrelation",
    "noise_correlation",
    "drizzle_noise_covariance",
    "drizzle_field_covariance",
    "APERTURE_RADII_PIX",
    "MIN_EMPTY_APERTURES",
    "Tile",
    "plan_tiles",
    "owned_pixels",
]

