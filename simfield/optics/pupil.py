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

Each raster cell holds the fraction of its area that is clear (analytic anti-aliasing, see
:func:`_amplitude`), so gaps and struts narrower than a cell still remove the right area and the
raster approximates the cell average of the true pupil.

Wavefront error (optical path difference, nm): per-segment piston, tip and tilt, each term
normalised to unit rms over a hexagon and drawn with rms ``segment_wfe_rms_nm / sqrt(3)`` (so the
expected rms over a segment is ``segment_wfe_rms_nm``), plus global Zernike terms (Noll index
4, 5, ... over the circle of radius ``diameter_m / 2``, GalSim's unit-rms normalisation) with
coefficients drawn as ``zernike_rms_nm[j]`` times a standard normal deviate. All draws come from
the generator passed in, in a fixed order independent of the raster size. The clear-area-weighted
mean and tilt of the result (its least-squares plane) are then removed: piston does not change
the image and a net tilt only moves it, so the PSF stays centred on the optical axis.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..config import TelescopeConfig
from ..random import stream

__all__ = ["Pupil", "make_pupil", "scenario_pupil", "pupil_extent_m", "segment_centers",
           "with_zernike", "with_segment_terms"]

_SQRT3 = np.sqrt(3.0)
#: unit normals of the three edge pairs of a flat-topped hexagon (30, 90, 150 deg)
_HEX_NORMALS = np.array([[np.cos(np.deg2rad(a)), np.sin(np.deg2rad(a))] for a in (30, 90, 150)])
#: rms of x (or y) over a regular hexagon of flat-to-flat f, in units of f:
#: <x^2> = 5 R^2 / 24 with circumradius R = f / sqrt(3), so rms = f sqrt(5/72).
_HEX_RMS_PER_FLAT = np.sqrt(5.0 / 72.0)


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
    """Centre (m) of axial lattice node (q, r): q a1 + r a2, a1 = pitch (sqrt3/2, 1/2),
    a2 = pitch (0, 1)."""
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


def _cell_cdf(t: np.ndarray, nx: float, ny: float, scale: float) -> np.ndarray:
    """Fraction of a square cell (side ``scale``, axes x, y) lying where n.(p - centre) <= t.

    The cell's area projected on the unit normal n is the distribution of U(-a, a) + U(-b, b),
    a = scale |nx| / 2, b = scale |ny| / 2 (a trapezoid); this is its cumulative distribution,
    so the fraction is exact for a straight edge.
    """
    a, b = 0.5 * scale * abs(nx), 0.5 * scale * abs(ny)
    a, b = max(a, b), min(a, b)
    t = np.asarray(t, dtype=float)
    lin = np.clip((t + a) / (2.0 * a), 0.0, 1.0)
    if b < 1e-9 * a:
        return lin
    lo = np.clip(t + a + b, 0.0, 2.0 * b) ** 2 / (8.0 * a * b)  # rising corner
    hi = np.clip(a + b - t, 0.0, 2.0 * b) ** 2 / (8.0 * a * b)  # falling corner
    return np.where(t < b - a, lo, np.where(t > a - b, 1.0 - hi, lin))


def _overlap(u: np.ndarray, n: tuple[float, float], scale: float, lo: float,
             hi: float) -> np.ndarray:
    """Fraction of the cell centred at normal coordinate ``u`` inside lo <= n.p <= hi."""
    nx, ny = n
    out = _cell_cdf(hi - u, nx, ny, scale) if np.isfinite(hi) else 1.0
    if np.isfinite(lo):
        out = out - _cell_cdf(lo - u, nx, ny, scale)
    return out


def _hexagon_cover(x, y, cx, cy, flat: float, scale: float) -> np.ndarray:
    """Clear fraction of cells at (x, y) from a flat-topped hexagon centred at (cx, cy)."""
    cov = np.ones(np.broadcast(x, y, cx, cy).shape)
    for nx, ny in _HEX_NORMALS:
        cov = cov * _overlap(nx * (x - cx) + ny * (y - cy), (nx, ny), scale,
                             -flat / 2.0, flat / 2.0)
    return cov


#: axial offsets of the lattice neighbour across the edge with normal _HEX_NORMALS[k]
_ACROSS = np.array([[1, 0], [0, 1], [-1, 1]])


def _segments_cover(tel: TelescopeConfig, x: np.ndarray, y: np.ndarray, scale: float):
    """Clear fraction of cells (centres x, y) from the mirror segments.

    A cell (smaller than a segment) can only overlap the segment of its own lattice cell and
    the two neighbours across the two nearest edges of that cell.
    """
    p = tel.pupil
    pitch = p.segment_flat_m + p.gap_m
    q0, r0 = _hex_round(x / (pitch * _SQRT3 / 2.0), y / pitch - x / (pitch * _SQRT3))
    cx, cy = _lattice_centres(q0, r0, pitch)
    proj = np.stack([nx * (x - cx) + ny * (y - cy) for nx, ny in _HEX_NORMALS])
    order = np.argsort(-np.abs(proj), axis=0)
    sign = np.sign(np.take_along_axis(proj, order, axis=0))
    cov = np.zeros(np.broadcast(x, y).shape)
    for j in range(3):
        if j == 0:
            q, r = q0, r0
        else:
            step = _ACROSS[order[j - 1]] * sign[j - 1][..., None]
            q, r = q0 + step[..., 0], r0 + step[..., 1]
        ring = np.maximum(np.maximum(np.abs(q), np.abs(r)), np.abs(q + r))
        exists = ring <= p.segment_rings
        if p.central_hole:
            exists &= ring > 0
        hx, hy = _lattice_centres(q, r, pitch)
        cov += np.where(exists, _hexagon_cover(x, y, hx, hy, p.segment_flat_m, scale), 0.0)
    return np.minimum(cov, 1.0)


def _amplitude(tel: TelescopeConfig, coords: np.ndarray, scale: float) -> np.ndarray:
    """Clear fraction of each cell.

    Each edge is treated locally as straight, and the fraction of the cell on its clear side
    is computed exactly (:func:`_cell_cdf`), so the area of every edge, gap and strut is kept
    even when narrower than a cell; polygons and bars are products of such fractions (exact
    away from corners), obstructions and struts multiply the clear fraction.
    """
    p = tel.pupil
    x, y = np.meshgrid(coords, coords)
    rho = np.hypot(x, y)
    if p.kind == "circular":
        amp = _disc_cover(x, y, rho, tel.diameter_m / 2.0, scale)
    else:
        amp = _segments_cover(tel, x, y, scale)
    if p.obstruction_diameter_m > 0:
        half = p.obstruction_diameter_m / 2.0
        if p.obstruction_shape == "circle":
            blocked = _disc_cover(x, y, rho, half, scale)
        else:
            blocked = _hexagon_cover(x, y, 0.0, 0.0, p.obstruction_diameter_m, scale)
        amp = amp * (1.0 - blocked)
    for a in _strut_angles(tel)[: p.strut_count]:
        ca, sa = np.cos(a), np.sin(a)
        along = x * ca + y * sa
        across = -x * sa + y * ca
        blocked = (_overlap(across, (-sa, ca), scale, p.strut_offset_m - p.strut_width_m / 2.0,
                            p.strut_offset_m + p.strut_width_m / 2.0)
                   * _overlap(along, (ca, sa), scale, 0.0, np.inf))
        amp = amp * (1.0 - blocked)
    return amp


def _disc_cover(x, y, rho, radius: float, scale: float) -> np.ndarray:
    """Clear fraction of cells from a disc of ``radius`` (m), its edge taken as locally straight."""
    cov = (rho <= radius).astype(float)
    near = np.abs(rho - radius) < scale
    nx, ny = x[near] / np.maximum(rho[near], 1e-300), y[near] / np.maximum(rho[near], 1e-300)
    a = 0.5 * scale * np.maximum(np.abs(nx), np.abs(ny))
    b = 0.5 * scale * np.minimum(np.abs(nx), np.abs(ny))
    cov[near] = _trapezoid_cdf(radius - rho[near], a, b)
    return cov


def _trapezoid_cdf(t: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cumulative distribution of U(-a, a) + U(-b, b) at t, arrays with a >= b >= 0."""
    b = np.maximum(b, 1e-12 * a)
    lin = np.clip((t + a) / (2.0 * a), 0.0, 1.0)
    lo = np.clip(t + a + b, 0.0, 2.0 * b) ** 2 / (8.0 * a * b)
    hi = np.clip(a + b - t, 0.0, 2.0 * b) ** 2 / (8.0 * a * b)
    return np.where(t < b - a, lo, np.where(t > a - b, 1.0 - hi, lin))


def _segment_opd(tel: TelescopeConfig, x: np.ndarray, y: np.ndarray,
                 seg: np.ndarray) -> np.ndarray:
    """OPD (nm) at points (x, y) (m) of segment piston, tip and tilt ``seg`` (nm, shape
    (n_segments, 3), each term of unit rms over a hexagon; order of :func:`segment_centers`);
    0 off the segments."""
    p = tel.pupil
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
    out = np.zeros(np.shape(x))
    out[ok] = s[:, 0] + (s[:, 1] * (x - cx)[ok] + s[:, 2] * (y - cy)[ok]) / norm
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
        opd += _segment_opd(tel, x, y, seg)
    if zc.size and np.any(zc):
        from galsim.zernike import Zernike

        z = Zernike(np.concatenate([np.zeros(4), zc]), R_outer=tel.diameter_m / 2.0)
        opd += z.evalCartesian(x, y)
    return opd


def _remove_plane(opd: np.ndarray, amp: np.ndarray, coords: np.ndarray) -> np.ndarray:
    """``opd`` (nm) less its least-squares plane a + b x + c y, weighted by the clear fraction
    ``amp``, on the clear cells (0 where opaque)."""
    if not np.any(opd):
        return opd
    x, y = np.meshgrid(coords, coords)
    w = amp.ravel()
    basis = np.stack([np.ones(w.size), x.ravel(), y.ravel()], axis=1)
    sw = np.sqrt(w)[:, None]
    coef = np.linalg.lstsq(basis * sw, opd.ravel() * sw[:, 0], rcond=None)[0]
    return (opd - (basis @ coef).reshape(opd.shape)) * (amp > 0)


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
    amp = _amplitude(tel, coords, scale)
    opd = _remove_plane(_opd(tel, coords, rng) * (amp > 0), amp, coords)
    amp.setflags(write=False)
    opd.setflags(write=False)
    return Pupil(amplitude=amp, opd_nm=opd, scale_m=float(scale),
                 area_m2=float(amp.sum() * scale * scale))


def scenario_pupil(tel: TelescopeConfig, seed: int, grid_size: int | None = None) -> Pupil:
    """The scenario's pupil: wavefront error drawn from ``stream(seed, "optics", "pupil")``.

    This is the pupil every band PSF of the scenario uses (at the raster size each PSF needs);
    use it for pictures and reports so they show the same wavefront error.

    Parameters
    ----------
    tel : TelescopeConfig
    seed : int
        The scenario's seed.
    grid_size : int, optional
        Raster cells across; default ``tel.pupil.grid_size``.
    """
    return make_pupil(tel, stream(int(seed), "optics", "pupil"), grid_size=grid_size)


def with_zernike(pupil: Pupil, noll4_nm, radius_m: float) -> Pupil:
    """``pupil`` with global Zernike terms added to its wavefront error.

    Parameters
    ----------
    pupil : Pupil
    noll4_nm : sequence of float (nm)
        Coefficients of Noll 4, 5, 6, ... (GalSim's unit-rms normalisation over the circle of
        ``radius_m``), e.g. the field-dependent focus and astigmatism of
        :mod:`simfield.optics.field`.
    radius_m : float (m)
        Radius of the Zernike circle (half the telescope diameter).

    Returns
    -------
    Pupil
        Same amplitude and raster; OPD (nm) increased by the terms on the clear cells.
    """
    c = np.asarray(noll4_nm, dtype=float)
    if not c.size or not np.any(c):
        return pupil
    from galsim.zernike import Zernike

    x, y = np.meshgrid(pupil.coords_m, pupil.coords_m)
    add = Zernike(np.concatenate([np.zeros(4), c]), R_outer=radius_m).evalCartesian(x, y)
    opd = pupil.opd_nm + add * (pupil.amplitude > 0)
    opd.setflags(write=False)
    return Pupil(amplitude=pupil.amplitude, opd_nm=opd, scale_m=pupil.scale_m,
                 area_m2=pupil.area_m2)


def with_segment_terms(pupil: Pupil, tel: TelescopeConfig, seg_nm) -> Pupil:
    """``pupil`` with segment piston, tip and tilt ``seg_nm`` (nm, shape (n_segments, 3), the
    normalisation of the drawn segment errors) added to its wavefront error, their net mean and
    tilt removed (a drift that moves the image is the pointing's, not the PSF's).
    """
    seg = np.asarray(seg_nm, dtype=float)
    if not seg.size or not np.any(seg) or tel.pupil.kind != "segmented":
        return pupil
    x, y = np.meshgrid(pupil.coords_m, pupil.coords_m)
    add = _remove_plane(_segment_opd(tel, x, y, seg) * (pupil.amplitude > 0), pupil.amplitude,
                        pupil.coords_m)
    opd = pupil.opd_nm + add
    opd.setflags(write=False)
    return Pupil(amplitude=pupil.amplitude, opd_nm=opd, scale_m=pupil.scale_m,
                 area_m2=pupil.area_m2)
