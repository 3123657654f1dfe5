"""Pixel grids on the tangent plane of the field centre, with their TAN WCS.

Conventions (used by every stage):

- Sky positions are tangent-plane offsets (xi, eta) in arcsec from the field centre, xi toward
  east (increasing RA), eta toward north (gnomonic projection).
- Pixel indices are 0-based; pixel (row=0, col=0) covers [-0.5, 0.5] x [-0.5, 0.5] and its centre
  is the point (x=0, y=0), ``x`` the column and ``y`` the row (numpy ``image[y, x]``). FITS WCS
  keywords use 1-based CRPIX, converted here.
- With roll 0, north is up (+y) and east is left (-x), the usual sky orientation.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
from astropy.wcs import WCS

__all__ = ["Grid"]


@dataclass(frozen=True)
class Grid:
    """A rectangular pixel grid on the tangent plane.

    Attributes
    ----------
    nx, ny : int
        Columns and rows.
    scale : float (arcsec/pixel)
        Pixel side.
    ra0, dec0 : float (deg)
        Tangent point (field centre).
    roll_deg : float (deg)
        Rotation of the grid's +y axis east of north.
    xi0, eta0 : float (arcsec)
        Tangent-plane offset of the grid centre from the tangent point (dither offsets).
    """

    nx: int
    ny: int
    scale: float
    ra0: float
    dec0: float
    roll_deg: float = 0.0
    xi0: float = 0.0
    eta0: float = 0.0

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx), the numpy shape of an image on this grid."""
        return (self.ny, self.nx)

    @property
    def center_pixel(self) -> tuple[float, float]:
        """0-based (x, y) of the grid centre."""
        return ((self.nx - 1) / 2.0, (self.ny - 1) / 2.0)

    def _rot(self):
        t = np.deg2rad(self.roll_deg)
        return np.cos(t), np.sin(t)

    def window(self, x0: int, y0: int, nx: int, ny: int) -> "Grid":
        """The sub-grid of ``nx`` x ``ny`` pixels whose pixel (0, 0) is this grid's (x0, y0).

        Same scale, roll and tangent point; pixel (i, j) of the window is pixel
        (x0 + i, y0 + j) of this grid (0-based integers), so images cut from this grid with
        ``image[y0:y0 + ny, x0:x0 + nx]`` lie on the window exactly.
        """
        xi0, eta0 = self.pixel_to_offsets(x0 + (nx - 1) / 2.0, y0 + (ny - 1) / 2.0)
        return Grid(nx=int(nx), ny=int(ny), scale=self.scale, ra0=self.ra0, dec0=self.dec0,
                    roll_deg=self.roll_deg, xi0=float(xi0), eta0=float(eta0))

    def pixel_frame(self) -> np.ndarray:
        """2x2 matrix M with (column, row) directions = M (xi, eta); M is its own inverse.

        ``profile.transform(*M.ravel())`` turns a GalSim profile drawn in (xi, eta) into one
        drawn along the grid's columns and rows (a reflection, flux unchanged).
        """
        c, s = self._rot()
        return np.array([[-c, s], [s, c]])

    def offsets_to_pixel(self, xi, eta):
        """Tangent-plane offsets (arcsec) -> 0-based pixel (x, y)."""
        c, s = self._rot()
        dxi = (np.asarray(xi, dtype=float) - self.xi0) / self.scale
        deta = (np.asarray(eta, dtype=float) - self.eta0) / self.scale
        # grid axes: +y is rotated by roll east of north; +x is 90 deg clockwise from +y (west)
        u = -dxi * c + deta * s  # along +x
        v = dxi * s + deta * c  # along +y
        cx, cy = self.center_pixel
        return u + cx, v + cy

    def pixel_to_offsets(self, x, y):
        """0-based pixel (x, y) -> tangent-plane offsets (xi, eta) in arcsec."""
        c, s = self._rot()
        cx, cy = self.center_pixel
        u = np.asarray(x, dtype=float) - cx
        v = np.asarray(y, dtype=float) - cy
        dxi = -u * c + v * s
        deta = u * s + v * c
        return dxi * self.scale + self.xi0, deta * self.scale + self.eta0

    def pixel_offsets(self):
        """(xi, eta) offsets (arcsec) of every pixel centre, each of shape (ny, nx)."""
        y, x = np.mgrid[0:self.ny, 0:self.nx].astype(float)
        return self.pixel_to_offsets(x, y)

    @cached_property
    def wcs(self) -> WCS:
        """TAN WCS of the grid (ICRS, degrees)."""
        w = WCS(naxis=2)
        w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
        w.wcs.cunit = ["deg", "deg"]
        w.wcs.crval = [self.ra0, self.dec0]
        # tangent point in pixels (0-based), then 1-based for FITS
        px, py = self.offsets_to_pixel(0.0, 0.0)
        w.wcs.crpix = [float(px) + 1.0, float(py) + 1.0]
        c, s = self._rot()
        d = self.scale / 3600.0
        # d(xi)/dx, d(xi)/dy, d(eta)/dx, d(eta)/dy in degrees per pixel
        w.wcs.cd = [[-c * d, s * d], [s * d, c * d]]
        w.wcs.radesys = "ICRS"
        return w

    def sky_to_pixel(self, ra, dec):
        """ICRS (deg) -> 0-based pixel (x, y)."""
        return self.wcs.all_world2pix(np.asarray(ra, float), np.asarray(dec, float), 0)

    def pixel_to_sky(self, x, y):
        """0-based pixel (x, y) -> ICRS (ra, dec) in degrees."""
        return self.wcs.all_pix2world(np.asarray(x, float), np.asarray(y, float), 0)

    def offsets_to_sky(self, xi, eta):
        """Tangent-plane offsets (arcsec) -> ICRS (ra, dec) in degrees (exact gnomonic)."""
        x, y = self.offsets_to_pixel(xi, eta)
        return self.pixel_to_sky(x, y)

    def sky_to_offsets(self, ra, dec):
        """ICRS (deg) -> tangent-plane offsets (xi, eta) in arcsec."""
        x, y = self.sky_to_pixel(ra, dec)
        return self.pixel_to_offsets(x, y)

    def contains(self, x, y, margin: float = 0.0):
        """True where 0-based pixel (x, y) lies inside the grid shrunk by ``margin`` pixels."""
        x = np.asarray(x)
        y = np.asarray(y)
        return ((x >= -0.5 + margin) & (x <= self.nx - 0.5 - margin)
                & (y >= -0.5 + margin) & (y <= self.ny - 0.5 - margin))
