"""One-to-one sky matching of detections to truth images.

Positions are projected onto the tangent plane of the field centre (gnomonic projection, xi east,
eta north, arcsec; exact, so a separation below an arcminute is the great-circle distance to
better than 1e-7 relative). Candidate pairs closer than the match radius come from a KD-tree
(``scipy.spatial.cKDTree.sparse_distance_matrix``).

Tie-break: greedy by distance. All candidate pairs are put in one total order, by separation,
then truth index, then detection index; walking that order, a pair is accepted when neither its
truth image nor its detection is taken yet. This is computed without a Python loop by rounds of
"mutual best" pairs: in each round, every still-free truth image and detection points at its
first remaining pair in the order; pairs chosen from both ends are accepted, then pairs touching
an accepted node are dropped. The result equals the sequential greedy walk: a mutual-best pair
(t, d) comes before every other remaining pair of t or d, so when the walk reaches it both are
free; and every pair the walk accepts becomes mutual-best once the earlier accepted pairs are
removed. It depends only on the positions and the row order of the inputs, never on the
KD-tree's internal order, so it is deterministic.

Greedy-by-distance rather than a minimum-total-distance assignment: it never trades a closer
pair for two farther ones, which is what "the detection of this image" means to a reader, and
it runs in O(n log n).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

__all__ = ["MatchResult", "tangent_offsets", "match_positions", "match_sky", "match_radius",
           "gather"]

_DEG = np.pi / 180.0
_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


@dataclass(frozen=True)
class MatchResult:
    """One-to-one matches.

    Attributes
    ----------
    truth_index, det_index : ndarray of int
        Matched pairs (row indices into the truth and detection inputs), sorted by truth index.
    separation : ndarray (arcsec)
        Separation of each pair.
    truth_to_det : ndarray of int
        For each truth row, its matched detection row or -1.
    det_to_truth : ndarray of int
        For each detection row, its matched truth row or -1.
    """

    truth_index: np.ndarray
    det_index: np.ndarray
    separation: np.ndarray
    truth_to_det: np.ndarray
    det_to_truth: np.ndarray


def gather(values, index, fill):
    """``values[index]`` where ``index >= 0`` and ``fill`` where it is -1 (nothing matched),
    as ``np.where``; also when ``values`` is empty (a run without detections or without truth
    images), where indexing with the clipped index would fail."""
    values, index = np.asarray(values), np.asarray(index)
    if values.size == 0:
        if np.any(index >= 0):
            raise IndexError("gather: an index >= 0 into an empty array")
        return np.full(index.shape, fill)
    return np.where(index >= 0, values[np.maximum(index, 0)], fill)


def tangent_offsets(ra, dec, ra0: float, dec0: float):
    """Gnomonic projection about (ra0, dec0).

    Parameters
    ----------
    ra, dec : array_like (deg)
        Sky positions.
    ra0, dec0 : float (deg)
        Tangent point.

    Returns
    -------
    xi, eta : ndarray (arcsec)
        Offsets east and north on the tangent plane (Calabretta & Greisen 2002, A&A 395, 1077,
        TAN projection).
    """
    a = np.asarray(ra, float) * _DEG
    d = np.asarray(dec, float) * _DEG
    a0, d0 = ra0 * _DEG, dec0 * _DEG
    cosc = np.sin(d0) * np.sin(d) + np.cos(d0) * np.cos(d) * np.cos(a - a0)
    xi = np.cos(d) * np.sin(a - a0) / cosc
    eta = (np.cos(d0) * np.sin(d) - np.sin(d0) * np.cos(d) * np.cos(a - a0)) / cosc
    return xi * _ARCSEC_PER_RAD, eta * _ARCSEC_PER_RAD


def match_radius(radius_arcsec: float, radius_fwhm: float = 0.0,
                 psf_fwhm_arcsec: float | None = None) -> float:
    """Match radius (arcsec): ``radius_fwhm`` x PSF FWHM when both are given and > 0."""
    if radius_fwhm and radius_fwhm > 0:
        if not psf_fwhm_arcsec or psf_fwhm_arcsec <= 0:
            raise ValueError("'psf_fwhm_arcsec' must be > 0 when the radius is given in FWHM")
        return float(radius_fwhm * psf_fwhm_arcsec)
    return float(radius_arcsec)


def _greedy(ti, di, dist, n_truth, n_det):
    """Greedy-by-distance one-to-one selection of candidate pairs (see module docstring)."""
    order = np.lexsort((di, ti, dist))  # primary key: dist, then ti, then di
    ti, di, dist = ti[order], di[order], dist[order]
    rank = np.arange(ti.size)
    t2d = np.full(n_truth, -1, dtype=np.int64)
    d2t = np.full(n_det, -1, dtype=np.int64)
    big = ti.size
    while ti.size:
        best_t = np.full(n_truth, big, dtype=np.int64)
        best_d = np.full(n_det, big, dtype=np.int64)
        np.minimum.at(best_t, ti, rank)
        np.minimum.at(best_d, di, rank)
        ok = (best_t[ti] == rank) & (best_d[di] == rank)
        t2d[ti[ok]] = di[ok]
        d2t[di[ok]] = ti[ok]
        keep = (t2d[ti] < 0) & (d2t[di] < 0)
        ti, di, rank = ti[keep], di[keep], rank[keep]
    return t2d, d2t


def match_positions(xt, yt, xd, yd, radius: float) -> MatchResult:
    """One-to-one match of two sets of planar positions within ``radius``.

    Parameters
    ----------
    xt, yt : array_like (arcsec)
        Truth positions on the tangent plane.
    xd, yd : array_like (arcsec)
        Detection positions on the same plane.
    radius : float (arcsec)
        Largest accepted separation (inclusive).

    Returns
    -------
    MatchResult
    """
    pt = np.column_stack([np.asarray(xt, float), np.asarray(yt, float)])
    pd = np.column_stack([np.asarray(xd, float), np.asarray(yd, float)])
    nt, nd = len(pt), len(pd)
    if nt == 0 or nd == 0 or not radius > 0:
        t2d = np.full(nt, -1, np.int64)
        d2t = np.full(nd, -1, np.int64)
    else:
        tt, td = cKDTree(pt), cKDTree(pd)
        pairs = tt.sparse_distance_matrix(td, radius, output_type="ndarray")
        t2d, d2t = _greedy(pairs["i"].astype(np.int64), pairs["j"].astype(np.int64),
                           pairs["v"], nt, nd)
    ti = np.flatnonzero(t2d >= 0)
    di = t2d[ti]
    sep = np.hypot(pt[ti, 0] - pd[di, 0], pt[ti, 1] - pd[di, 1]) if ti.size else np.zeros(0)
    return MatchResult(ti, di, sep, t2d, d2t)


def match_sky(ra_t, dec_t, ra_d, dec_d, radius_arcsec: float, ra0: float | None = None,
              dec0: float | None = None) -> MatchResult:
    """One-to-one match of truth and detected sky positions.

    Parameters
    ----------
    ra_t, dec_t : array_like (deg)
        Truth image positions.
    ra_d, dec_d : array_like (deg)
        Detection positions.
    radius_arcsec : float (arcsec)
        Largest accepted separation.
    ra0, dec0 : float (deg), optional
        Tangent point; default the mean truth position (adequate for fields below a few degrees).

    Returns
    -------
    MatchResult
        Separations are tangent-plane distances (arcsec).
    """
    ra_t = np.asarray(ra_t, float)
    dec_t = np.asarray(dec_t, float)
    if ra0 is None or dec0 is None:
        if ra_t.size == 0:
            ra0, dec0 = 0.0, 0.0
        else:
            # circular mean of RA, robust at RA = 0/360
            ra0 = float(np.degrees(np.arctan2(np.mean(np.sin(ra_t * _DEG)),
                                              np.mean(np.cos(ra_t * _DEG)))) % 360.0)
            dec0 = float(np.mean(dec_t))
    xt, yt = tangent_offsets(ra_t, dec_t, ra0, dec0)
    xd, yd = tangent_offsets(ra_d, dec_d, ra0, dec0)
    return match_positions(xt, yt, xd, yd, radius_arcsec)
