"""Completeness, purity, causes of false detections, photometric bias and completeness fits.

Fractions per bin carry Jeffreys intervals: the central quantiles of the Beta posterior of a
binomial under the Jeffreys prior, Beta(k + 1/2, n - k + 1/2), with the lower bound set to 0 at
k = 0 and the upper bound to 1 at k = n (Brown, Cai & DasGupta 2001, Statistical Science 16, 101,
sec. 4.1.2; Beta quantiles as in Cameron 2011, PASA 28, 128), so every interval holds k/n.

Completeness curves are fitted in :mod:`simfield.score.fit` (maximum likelihood, with the rules
for quoting their 50% / 90% limits); its names are importable from here too.

Units: magnitudes AB, sizes arcsec, surface brightness AB mag/arcsec^2, pixel positions 0-based.
"""

from __future__ import annotations

import numpy as np
from astropy.table import Table
from scipy import stats

from .fit import (BIN_MIN_N, FIT_P_MIN, LIMIT_ERR_MAX, CompletenessFit, binned_deviance,
                  completeness_model, fit_completeness, gof_bins)

__all__ = [
    "FALSE_CAUSES",
    "INTERVAL_NOTE",
    "beta_interval",
    "binned_fraction",
    "binned_fraction_2d",
    "photometric_bias",
    "mean_surface_brightness",
    "FIT_P_MIN",
    "BIN_MIN_N",
    "LIMIT_ERR_MAX",
    "CompletenessFit",
    "gof_bins",
    "binned_deviance",
    "completeness_model",
    "fit_completeness",
    "measure_spike_angles",
    "classify_false_detections",
]

#: how the per-bin intervals are made (``level`` filled in)
INTERVAL_NOTE = ("Jeffreys {level:g} interval: Beta(k+1/2, n-k+1/2) quantiles, 0 at k=0 and 1 at "
                 "k=n (Brown, Cai & DasGupta 2001, Stat. Sci. 16, 101)")

#: causes of unmatched detections, in order of precedence
FALSE_CAUSES = ("artefact", "persistence", "spike", "shred", "blend", "stripe", "noise")

# normalised median absolute deviation: sigma = 1.4826 MAD for a Gaussian (common practice)
_NMAD = 1.4826


def beta_interval(k, n, level: float = 0.683):
    """Jeffreys interval of a binomial fraction (Brown, Cai & DasGupta 2001, Statistical
    Science 16, 101, sec. 4.1.2).

    Parameters
    ----------
    k, n : array_like of int
        Successes and trials; ``n == 0`` gives (0, 1).
    level : float (0..1)
        Central probability of the interval.

    Returns
    -------
    lo, hi : ndarray (dimensionless)
        Quantiles (1 -/+ level)/2 of Beta(k + 1/2, n - k + 1/2), with ``lo = 0`` where
        ``k == 0`` and ``hi = 1`` where ``k == n``: the interval always contains k/n.
    """
    k = np.asarray(k, float)
    n = np.asarray(n, float)
    a, b = k + 0.5, n - k + 0.5
    lo = np.where(k > 0, stats.beta.ppf(0.5 * (1.0 - level), a, b), 0.0)
    hi = np.where(k < n, stats.beta.ppf(0.5 * (1.0 + level), a, b), 1.0)
    return np.asarray(lo, float), np.asarray(hi, float)


def binned_fraction(values, success, edges, level: float = 0.683, name: str = "x") -> Table:
    """Fraction of ``success`` per bin of ``values`` with Beta intervals.

    Parameters
    ----------
    values : array_like
        Quantity binned on (any unit; NaN rows are ignored).
    success : array_like of bool
        Outcome per row.
    edges : array_like
        Bin edges (same unit as ``values``), increasing; bins are [lo, hi).
    level : float (0..1)
        Central level of the intervals.
    name : str
        Prefix of the bin columns.

    Returns
    -------
    Table
        Columns ``<name>_lo``, ``<name>_hi``, ``<name>_mid``, ``n``, ``k``, ``fraction`` (NaN
        where n = 0), ``fraction_lo``, ``fraction_hi``.
    """
    v = np.asarray(values, float)
    s = np.asarray(success, bool)
    edges = np.asarray(edges, float)
    ok = np.isfinite(v)
    n, _ = np.histogram(v[ok], edges)
    k, _ = np.histogram(v[ok & s], edges)
    lo, hi = beta_interval(k, n, level)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    t = Table()
    t[f"{name}_lo"], t[f"{name}_hi"] = edges[:-1], edges[1:]
    t[f"{name}_mid"] = 0.5 * (edges[:-1] + edges[1:])
    t["n"], t["k"] = n, k
    t["fraction"], t["fraction_lo"], t["fraction_hi"] = frac, lo, hi
    t.meta["interval"] = INTERVAL_NOTE.format(level=level)
    return t


def binned_fraction_2d(xv, yv, success, x_edges, y_edges, level: float = 0.683,
                       names=("x", "y")) -> Table:
    """Fraction of ``success`` on a 2-D grid of bins (one row per cell), as :func:`binned_fraction`."""
    xv, yv = np.asarray(xv, float), np.asarray(yv, float)
    s = np.asarray(success, bool)
    ok = np.isfinite(xv) & np.isfinite(yv)
    n, _, _ = np.histogram2d(xv[ok], yv[ok], [x_edges, y_edges])
    k, _, _ = np.histogram2d(xv[ok & s], yv[ok & s], [x_edges, y_edges])
    xe, ye = np.asarray(x_edges, float), np.asarray(y_edges, float)
    ix, iy = np.meshgrid(np.arange(xe.size - 1), np.arange(ye.size - 1), indexing="ij")
    ix, iy = ix.ravel(), iy.ravel()
    n, k = n.ravel().astype(int), k.ravel().astype(int)
    lo, hi = beta_interval(k, n, level)
    t = Table()
    for nm, e, i in ((names[0], xe, ix), (names[1], ye, iy)):
        t[f"{nm}_lo"], t[f"{nm}_hi"] = e[i], e[i + 1]
    t["n"], t["k"] = n, k
    with np.errstate(invalid="ignore", divide="ignore"):
        t["fraction"] = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    t["fraction_lo"], t["fraction_hi"] = lo, hi
    return t


def mean_surface_brightness(mag, r_half_arcsec):
    """Mean surface brightness inside the half-light radius (AB mag/arcsec^2).

    <mu>_e = m + 2.5 log10(2 pi r_e^2): half the light over the area pi r_e^2 (Graham & Driver
    2005, PASA 22, 118, eq. 8 [mem]). Lensing conserves it.
    """
    r = np.asarray(r_half_arcsec, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(mag, float) + 2.5 * np.log10(2.0 * np.pi * np.where(r > 0, r, np.nan)**2)


def photometric_bias(mag_true, mag_meas, edges) -> Table:
    """Median offset and scatter of measured - true magnitudes per true-magnitude bin.

    Parameters
    ----------
    mag_true, mag_meas : array_like (AB mag)
        Matched pairs.
    edges : array_like (AB mag)
        Bin edges in true magnitude.

    Returns
    -------
    Table
        ``mag_lo``, ``mag_hi``, ``mag_mid``, ``n``, ``median`` (mag), ``nmad`` (1.4826 x median
        absolute deviation, mag), ``mean``, ``std`` (mag).
    """
    mt = np.asarray(mag_true, float)
    d = np.asarray(mag_meas, float) - mt
    edges = np.asarray(edges, float)
    ok = np.isfinite(d) & np.isfinite(mt)
    idx = np.digitize(mt[ok], edges) - 1
    d = d[ok]
    nb = edges.size - 1
    rows = {"n": np.zeros(nb, int), "median": np.full(nb, np.nan), "nmad": np.full(nb, np.nan),
            "mean": np.full(nb, np.nan), "std": np.full(nb, np.nan)}
    for b in range(nb):
        x = d[idx == b]
        rows["n"][b] = x.size
        if x.size:
            med = np.median(x)
            rows["median"][b] = med
            rows["nmad"][b] = _NMAD * np.median(np.abs(x - med))
            rows["mean"][b] = x.mean()
            rows["std"][b] = x.std(ddof=1) if x.size > 1 else np.nan
    t = Table()
    t["mag_lo"], t["mag_hi"] = edges[:-1], edges[1:]
    t["mag_mid"] = 0.5 * (edges[:-1] + edges[1:])
    for key, v in rows.items():
        t[key] = v
    return t


# --------------------------------------------------------------------------------------------
# causes of false detections
# --------------------------------------------------------------------------------------------
def measure_spike_angles(psf, threshold: float = 3.0, r_in: float = 0.25, r_out: float = 0.48,
                         bin_deg: float = 2.0):
    """Directions of the diffraction spikes of a PSF image.

    In an annulus (``r_in`` .. ``r_out`` of the stamp size), each pixel is divided by the median
    of the pixels at its radius; azimuth bins whose median ratio exceeds ``threshold`` are spikes.

    Parameters
    ----------
    psf : ndarray, shape (n, n)
        PSF image, centred, in the mosaic's pixel orientation.
    threshold : float
        Contrast over the azimuthal median that makes a spike.
    r_in, r_out : float
        Annulus radii as fractions of the stamp side.
    bin_deg : float (deg)
        Azimuth bin size.

    Returns
    -------
    ndarray (deg)
        Bin-centre angles of the spikes, counter-clockwise from the +x axis, in [0, 360).
    """
    psf = np.asarray(psf, float)
    ny, nx = psf.shape
    y, x = np.mgrid[0:ny, 0:nx]
    cy, cx = np.unravel_index(np.argmax(psf), psf.shape)
    dx, dy = x - cx, y - cy
    r = np.hypot(dx, dy)
    side = min(nx, ny)
    ring = (r >= r_in * side) & (r <= r_out * side)
    if ring.sum() < 50:
        return np.zeros(0)
    ri = np.round(r[ring]).astype(int)
    vals = psf[ring]
    ratio = np.empty_like(vals)
    for rr in np.unique(ri):
        sel = ri == rr
        med = np.median(vals[sel])
        ratio[sel] = vals[sel] / med if med > 0 else np.where(vals[sel] > 0, np.inf, 0.0)
    ang = np.degrees(np.arctan2(dy[ring], dx[ring])) % 360.0
    nb = int(round(360.0 / bin_deg))
    ib = np.minimum((ang / bin_deg).astype(int), nb - 1)
    centres = (np.arange(nb) + 0.5) * bin_deg
    med_ratio = np.array([np.median(ratio[ib == b]) if np.any(ib == b) else 0.0
                          for b in range(nb)])
    return centres[med_ratio > threshold]


def classify_false_detections(det_x, det_y, det_truth, img_x, img_y, img_source, img_mag,
                              img_is_star, source_recovered: dict | np.ndarray,
                              pixel_scale_arcsec: float, *, truth_segm=None, dq=None,
                              spike_angles_deg=(), bright_star_mag: float = 22.0,
                              spike_ref_mag: float = 18.0, spike_length_arcsec: float = 6.0,
                              halo_radius_arcsec: float = 1.5, spike_half_width_deg: float = 4.0,
                              blend_radius_arcsec: float = 0.5):
    """Likely cause of every unmatched detection.

    Rules, first that applies wins (:data:`FALSE_CAUSES`):

    1. ``artefact``: a data-quality flag is set at the detection's pixel (``dq != 0``).
    2. ``spike``: near a truth star brighter than ``bright_star_mag``: within its halo radius, or
       within its spike length and inside ``spike_half_width_deg`` of a spike direction. Both
       radii scale as 10^(-0.2 (m - spike_ref_mag)), i.e. as the square root of the star's flux:
       the diffraction wings fall off as r^-2 (Born & Wolf sec. 8.5, far-field envelope of an
       edge), so the radius where they drop to a fixed threshold grows as sqrt(flux).
    3. ``shred``: the truth segmentation at the detection belongs to a source already recovered
       (a piece of an extended galaxy or lensed arc); without a segmentation map, the only truth
       image within ``blend_radius_arcsec`` belongs to a recovered source.
    4. ``blend``: two or more truth images within ``blend_radius_arcsec``, or the truth
       segmentation (or the single nearby truth image) belongs to a source not recovered: real
       light whose centroid is pulled off by a neighbour.
    5. ``noise``: none of the above.

    Parameters
    ----------
    det_x, det_y : array_like (0-based pixels)
        Detection positions on the mosaic.
    det_truth : array_like of int
        Matched truth-image row per detection, -1 if unmatched.
    img_x, img_y : array_like (0-based pixels)
        Truth image positions.
    img_source : array_like of int
        Truth source id of each image.
    img_mag : array_like (AB mag)
        Observed magnitude of each image.
    img_is_star : array_like of bool
        Whether the image is of a foreground star.
    source_recovered : dict {source id: bool}
        Whether each truth source was recovered (any image matched).
    pixel_scale_arcsec : float (arcsec/pixel)
        Mosaic pixel side.
    truth_segm, dq : ndarray of int, optional
        Truth segmentation (source ids, 0 = none) and data-quality map on the mosaic grid.
    spike_angles_deg : sequence of float (deg)
        Spike directions counter-clockwise from the mosaic +x axis.
    bright_star_mag, spike_ref_mag : float (AB mag)
    spike_length_arcsec, halo_radius_arcsec, blend_radius_arcsec : float (arcsec)
    spike_half_width_deg : float (deg)

    Returns
    -------
    ndarray of str
        Cause per detection; ``""`` for matched detections.
    """
    from scipy.spatial import cKDTree

    dx_ = np.asarray(det_x, float)
    dy_ = np.asarray(det_y, float)
    un = np.asarray(det_truth) < 0
    cause = np.full(dx_.size, "", dtype="<U11")
    cause[un] = "noise"
    idx = np.flatnonzero(un)
    if idx.size == 0:
        return cause
    ux, uy = dx_[idx], dy_[idx]
    undecided = np.ones(idx.size, bool)

    def _pix(img, x, y):
        ny, nx = img.shape
        ix = np.clip(np.round(x).astype(int), 0, nx - 1)
        iy = np.clip(np.round(y).astype(int), 0, ny - 1)
        return img[iy, ix]

    def _set(mask, name):
        m = mask & undecided
        cause[idx[m]] = name
        undecided[m] = False

    if dq is not None:
        _set(_pix(np.asarray(dq), ux, uy) != 0, "artefact")

    ix_, iy_ = np.asarray(img_x, float), np.asarray(img_y, float)
    isrc = np.asarray(img_source)
    star = np.asarray(img_is_star, bool) & (np.asarray(img_mag, float) < bright_star_mag)
    spike = np.zeros(idx.size, bool)
    angles = np.asarray(list(spike_angles_deg), float)
    for sx, sy, sm in zip(ix_[star], iy_[star], np.asarray(img_mag, float)[star]):
        scale = 10.0 ** (-0.2 * (sm - spike_ref_mag))
        ddx, ddy = ux - sx, uy - sy
        r = np.hypot(ddx, ddy) * pixel_scale_arcsec
        near = r <= halo_radius_arcsec * scale
        if angles.size:
            phi = np.degrees(np.arctan2(ddy, ddx))
            dphi = np.abs((phi[:, None] - angles[None, :] + 180.0) % 360.0 - 180.0)
            along = dphi.min(axis=1) <= spike_half_width_deg
            near |= along & (r <= spike_length_arcsec * scale)
        spike |= near
    _set(spike, "spike")

    rec = source_recovered
    is_rec = np.vectorize(lambda s: bool(rec.get(int(s), False)), otypes=[bool])
    n_near = np.zeros(idx.size, int)
    near_src = np.full(idx.size, -1)
    if ix_.size:
        tree = cKDTree(np.column_stack([ix_, iy_]))
        lists = tree.query_ball_point(np.column_stack([ux, uy]),
                                      blend_radius_arcsec / pixel_scale_arcsec)
        n_near = np.array([len(v) for v in lists], int)
        near_src = np.array([isrc[v[0]] if len(v) == 1 else -1 for v in lists])
    if truth_segm is not None:
        seg = _pix(np.asarray(truth_segm), ux, uy)
        has = seg > 0
        seg_rec = np.zeros(idx.size, bool)
        if has.any():
            seg_rec[has] = is_rec(seg[has])
        _set(has & seg_rec, "shred")
        _set((n_near >= 2) | (has & ~seg_rec), "blend")
    one = n_near == 1
    one_rec = np.zeros(idx.size, bool)
    if one.any():
        one_rec[one] = is_rec(near_src[one])
    _set(one & one_rec & (n_near < 2), "shred")
    _set((n_near >= 2) | (one & ~one_rec), "blend")
    return cause
