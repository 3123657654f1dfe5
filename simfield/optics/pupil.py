"""Entrance pupil of the telescope: a raster of clear amplitude and wavefront error.

Geometry (pupil-plane metres, ``x`` along raster columns, ``y`` along rows, origin on the
optical axis):

- ``segmented``: flat-topped regular hexagons (two edges parallel to ``x``, so the edge normals
  point at 30, 90, 150, ... deg from ``+x``) of flat-to-flat size ``segment_flat_m``, centres on
  a hexagonal lattice of pitch ``segment_flat_m + gap_m``, in ``segment_rings`` rings around the
  centre position (left open with ``central_hole``).
- ``circular``: one round mirror of diameter ``telescope.diameter_m``.
- Both: an optional central obstruction (circle of diameter, or flat-topped hexagon of
  flat-to-flat size, ``obstruction_diameter_m``) and ``strut_count`` struts. Strut ``k`` is a
  half-infinite bar of width ``strut_width_m`` from the axis outward along the angle
  ``strut_angles_deg[k]`` (counter-clockwise from ``+x``; equally spaced from 90 deg when the
  list is empty), its centre line shifted sideways by ``strut_offset_m``.

Each raster cell holds the fraction of its area that is clear (anti-aliasing by
``supersample`` x ``supersample`` point samples per cell), so gaps narrower than a cell still
remove the right area and the raster is a cell average of the true pupil.

Wavefront error (optical path difference, nm): per-segment piston, tip and tilt, each term
normalised to unit rms over a hexagon and drawn with rms ``segment_wfe_rms_nm / sqrt(3)`` (so the
expected rms over a segment is ``segment_wfe_rms_nm``), plus global Zernike terms (Noll index
4, 5, ... over the circle of radius ``diameter_m / 2``, GalSim's unit-rms normalisation) with
coefficients drawn as ``zernike_rms_nm[j]`` times a standard normal deviate. All draws come from
the generator passed in, in a fixed order independent of the raster size.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..config import TelescopeConfig

__all__ = ["Pupil", "make_pupil", "pupil_extent_m", "segment_centers"]

_SQRT3 = np.sqrt(3.0)
#: unit normals of the three edge pairs of a flat-topped hexagon (30, 90, 150 deg)
_HEX_NORMALS = np.array([[np.cos(np.deg2rad(a)), np.sin(np.deg2rad(a))] for a in (30, 90, 150)])
#: rms of x (or y) over a regular hexagon of flat-to-flat f, in units of f:
#: <x^2> = 5 R^2 / 24 with circumradius R = f / sqrt(3), so rms = f sqrt(5/72).
_HEX_RMS_PER_FLAT = np.sqrt(5.0 / 72.0)
_ROW_CHUNK_SAMPLES = 1 << 20  # fine samples evaluated at once (memory bound)


@dataclass(frozen=True, eq=False)
class Pupil:
    """A rastered entrance pupil.

    Attributes
    ----------
    amplitude : ndarray (dimensionless, 0..1), shape (n, n)
        Clear fraction of each raster cell; ``amplitude[row, col]``, cell centres at
        ``(index - (n - 1) / 2) * scale_m``.
    opd_nm : ndarray (nm), shape (n, n)
        Wavefront error (optical path difference) at the cell centres; 0 where opaque.
    scale_m : float (m)
        Side of one raster cell.
    area_m2 : float (m^2)
        Clear area, ``amplitude.sum() * scale_m**2``.
    """

    amplitude: np.ndarray
    opd_nm: np.ndarray
    scale_m: float
    area_m2: float

    @property
    def size(self) -> int:
        """Raster cells along one side."""
        return self.amplitude.shape[0]

    @property
    def coords_m(self) -> np.ndarray:
        """Cell-centre coordinates along either axis (m)."""
        n = self.size
        return (np.arange(n) - (n - 1) / 2.0) * self.scale_m

    @property
    def rms_wfe_nm(self) -> float:
        """Clear-area-weighted rms of the wavefront error about its mean (nm)."""
        w = self.amplitude
        mean = float((w * self.opd_nm).sum() / w.sum())
        return float(np.sqrt((w * (self.opd_nm - mean) ** 2).sum() / w.sum()))


def _hex_round(qf: np.ndarray, rf: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nearest hexagonal-lattice node of fractional axial coordinates (cube rounding)."""
    sf = -qf - rf
    q, r, s = np.rint(qf), np.rint(rf), np.rint(sf)
    dq, dr, ds = np.abs(q - qf), np.abs(r - rf), np.abs(s - sf)
    fix_q = (dq > dr) & (dq > ds)
    fix_r = ~fix_q & (dr > ds)
    q = np.where(fix_q, -r - s, q)
    r = np.where(fix_r, -q - s, r)
    return q, r


def _lattice_centres(q, r, pitch: float):
    """Centre (m) of axial lattice node (q, r); basis a1 = pitch (sqrt3/2, 1/2), a2 = pitch (0, 1)."""
    return q * pitch * _SQRT3 / 2.0, pitch * (r + q / 2.0)


def _segment_nodes(tel: TelescopeConfig) -> tuple[np.ndarray, np.ndarray]:
    """Axial lattice coordinates (q, r) of the segments, ordered by ring, then angle."""
    p = tel.pupil
    nr = p.segment_rings
    qs, rs = np.meshgrid(np.arange(-nr, nr + 1), np.arange(-nr, nr + 1), indexing="ij")
    qs, rs = qs.ravel(), rs.ravel()
    ring = np.maximum.reduce([np.abs(qs), np.abs(rs), np.abs(qs + rs)])
    keep = (ring <= nr) & ((ring > 0) | (not p.central_hole))
    qs, rs, ring = qs[keep], rs[keep], ring[keep]
    x, y = _lattice_centres(qs, rs, p.segment_flat_m + p.gap_m)
    order = np.lexsort((np.round(np.mod(np.arctan2(y, x), 2 * np.pi), 9), ring))
    return qs[order], rs[order]


def segment_centers(tel: TelescopeConfig) -> np.ndarray:
    """Centres (m) of the mirror segments, shape (n_segments, 2); empty for a circular pupil.

    The order (by ring, then angle from ``+x``) is the order of the segment wavefront draws.
    """
    if tel.pupil.kind != "segmented":
        return np.zeros((0, 2))
    q, r = _segment_nodes(tel)
    x, y = _lattice_centres(q, r, tel.pupil.segment_flat_m + tel.pupil.gap_m)
    return np.column_stack([x, y])


def pupil_extent_m(tel: TelescopeConfig) -> float:
    """Diameter (m) of the smallest centred circle holding the clear aperture."""
    p = tel.pupil
    if p.kind == "circular":
        return float(tel.diameter_m)
    c = segment_centers(tel)
    # farthest vertex: circumradius f / sqrt(3) beyond a centre (bounded by centre + R)
    return float(2.0 * (np.hypot(c[:, 0], c[:, 1]).max() + p.segment_flat_m / _SQRT3))


def _strut_angles(tel: TelescopeConfig) -> np.ndarray:
    p = tel.pupil
    if p.strut_angles_deg:
        return np.deg2rad(np.asarray(p.strut_angles_deg, dtype=float))
    return np.deg2rad(90.0 + 360.0 * np.arange(p.strut_count) / max(p.strut_count, 1))


def _clear(tel: TelescopeConfig, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Boolean: is the pupil point (x, y) (m) clear?"""
    p = tel.pupil
    if p.kind == "circular":
        clear = x * x + y * y <= (tel.diameter_m / 2.0) ** 2
    else:
        pitch = p.segment_flat_m + p.gap_m
        q, r = _hex_round(x / (pitch * _SQRT3 / 2.0), y / pitch - x / (pitch * _SQRT3))
        ring = np.maximum(np.maximum(np.abs(q), np.abs(r)), np.abs(q + r))
        cx, cy = _lattice_centres(q, r, pitch)
        dx, dy = x - cx, y - cy
        half = p.segment_flat_m / 2.0
        clear = ring <= p.segment_rings
        if p.central_hole:
            clear &= ring > 0
        for nx, ny in _HEX_NORMALS:
            clear &= np.abs(nx * dx + ny * dy) <= half
    if p.obstruction_diameter_m > 0:
        half = p.obstruction_diameter_m / 2.0
        if p.obstruction_shape == "circle":
            clear &= x * x + y * y > half * half
        else:
            inside = np.ones_like(clear)
            for nx, ny in _HEX_NORMALS:
                inside &= np.abs(nx * x + ny * y) <= half
            clear &= ~inside
    for a in _strut_angles(tel)[: p.strut_count]:
        along = x * np.cos(a) + y * np.sin(a)
        across = -x * np.sin(a) + y * np.cos(a) - p.strut_offset_m
        clear &= ~((along >= 0) & (np.abs(across) <= p.strut_width_m / 2.0))
    return clear


def _amplitude(tel: TelescopeConfig, coords: np.ndarray, scale: float, ss: int) -> np.ndarray:
    """Clear fraction of each cell, by ss x ss point samples per cell."""
    n = coords.size
    sub = ((np.arange(ss) + 0.5) / ss - 0.5) * scale
    xf = (coords[:, None] + sub[None, :]).ravel()  # fine sample positions along x (n*ss)
    out = np.empty((n, n))
    rows = max(1, _ROW_CHUNK_SAMPLES // (xf.size * ss))
    for r0 in range(0, n, rows):
        r1 = min(n, r0 + rows)
        yf = (coords[r0:r1, None] + sub[None, :]).ravel()
        c = _clear(tel, xf[None, :], yf[:, None])
        out[r0:r1] = c.reshape(r1 - r0, ss, n, ss).mean(axis=(1, 3))
    return out


def _opd(tel: TelescopeConfig, coords: np.ndarray, rng: np.random.Generator | None) -> np.ndarray:
    """Wavefront error (nm) at the cell centres."""
    p = tel.pupil
    n = coords.size
    opd = np.zeros((n, n))
    if rng is None or (p.segment_wfe_rms_nm == 0 and not any(p.zernike_rms_nm)):
        return opd
    x, y = np.meshgrid(coords, coords)
    centres = segment_centers(tel)
    # always draw in this order: segment terms, then Zernike coefficients
    seg = rng.standard_normal((len(centres), 3)) * (p.segment_wfe_rms_nm / np.sqrt(3.0))
    zc = rng.standard_normal(len(p.zernike_rms_nm)) * np.asarray(p.zernike_rms_nm, dtype=float)
    if len(centres) and p.segment_wfe_rms_nm > 0:
        nr = p.segment_rings
        pitch = p.segment_flat_m + p.gap_m
        q, r = _hex_round(x / (pitch * _SQRT3 / 2.0), y / pitch - x / (pitch * _SQRT3))
        cx, cy = _lattice_centres(q, r, pitch)
        # segment index of the lattice cell holding each raster point (-1: no segment)
        table = np.full((2 * nr + 1, 2 * nr + 1), -1)
        sq, sr = _segment_nodes(tel)
        table[sq + nr, sr + nr] = np.arange(sq.size)
        qi, ri = q.astype(int) + nr, r.astype(int) + nr
        inside = (qi >= 0) & (qi <= 2 * nr) & (ri >= 0) & (ri <= 2 * nr)
        idx = np.where(inside, table[np.clip(qi, 0, 2 * nr), np.clip(ri, 0, 2 * nr)], -1)
        ok = idx >= 0
        norm = p.segment_flat_m * _HEX_RMS_PER_FLAT
        s = seg[idx[ok]]
        opd[ok] += s[:, 0] + (s[:, 1] * (x - cx)[ok] + s[:, 2] * (y - cy)[ok]) / norm
    if zc.size and np.any(zc):
        from galsim.zernike import Zernike

        z = Zernike(np.concatenate([np.zeros(4), zc]), R_outer=tel.diameter_m / 2.0)
        opd += z.evalCartesian(x, y)
    return opd


def make_pupil(tel: TelescopeConfig, rng: np.random.Generator | None = None,
               grid_size: int | None = None) -> Pupil:
    """Raster the entrance pupil of ``tel``.

    Parameters
    ----------
    tel : TelescopeConfig
        Telescope; ``tel.pupil`` gives the geometry (m) and wavefront error (nm).
    rng : numpy.random.Generator, optional
        Source of the wavefront-error draws; ``None`` gives a perfect (zero OPD) pupil.
    grid_size : int, optional
        Raster cells across; default ``tel.pupil.grid_size``.

    Returns
    -------
    Pupil
        Amplitude (0..1), OPD (nm), cell size (m) and clear area (m^2). The raster spans the
        aperture's circumscribed circle plus one empty cell on each side.
    """
    n = int(grid_size or tel.pupil.grid_size)
    extent = pupil_extent_m(tel)
    scale = extent / (n - 2)
    coords = (np.arange(n) - (n - 1) / 2.0) * scale
    amp = _amplitude(tel, coords, scale, int(tel.pupil.supersample))
    opd = _opd(tel, coords, rng) * (amp > 0)
    amp.setflags(write=False)
    opd.setflags(write=False)
    return Pupil(amplitude=amp, opd_nm=opd, scale_m=float(scale),
                 area_m2=float(amp.sum() * scale * scale))
