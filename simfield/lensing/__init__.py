"""Gravitational lensing by a foreground cluster: mass profiles, a composite thin lens,
multiple images, critical curves and caustics, and lensed rendering of sources.

Angles are tangent-plane offsets (xi, eta) in arcsec from the field centre (see
:mod:`simfield.grid`); every component sits at the lens redshift and fields are stored for
D_ls/D_s = 1 ("reduced"), scaled per source redshift.
"""

from .images import CriticalCurves, critical_curves, find_images, write_lens_png
from .profiles import NFW, SIE, ExternalShear, PointMass, TruncatedSIS
from .raytrace import Lens, LensField, build_lens
from .render import forget_grid, lens_sources, render_lensed, source_plane_bounds

__all__ = [
    "Lens",
    "LensField",
    "build_lens",
    "NFW",
    "SIE",
    "TruncatedSIS",
    "PointMass",
    "ExternalShear",
    "CriticalCurves",
    "find_images",
    "critical_curves",
    "write_lens_png",
    "render_lensed",
    "lens_sources",
    "source_plane_bounds",
    "forget_grid",
]
