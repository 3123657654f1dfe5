"""Solving the lens equation: multiple images, critical curves and caustics, a lens map.

Images are found by the triangle-mapping method (Schneider, Ehlers & Falco 1992; Keeton 2001,
astro-ph/0102340 [mem]): the image plane is tiled with triangles whose vertices are mapped to
the source plane with the cached reduced deflection; a triangle that contains the
source holds an image, whose position is then refined by Newton iteration on the exact lens
equation. Many sources are handled at once: sources are grouped in bins of D_ls/D_s, and within
a bin a summed-area table of source counts in the source plane picks out the few triangles that
can hold any source, so the work per bin is a handful of whole-array operations.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.table import Table

from .raytrace import Lens, LensField

__all__ = [
    "CriticalCurves",
    "find_images",
    "critical_curves",
    "write_lens_png",
    "field_for_extent",
]

_RATIO_BIN = 0.04  # width of D_ls/D_s bins sharing one set of mapped triangles (dimensionless)
_NEWTON_STEPS = 10


def _extent_box(extent):
    """(xmin, xmax, ymin, ymax) in arcsec from a square side (centred) or a 4-tuple."""
    if np.ndim(extent) == 0:
        h = 0.5 * float(extent)
        return -h, h, -h, h
    xmin, xmax, ymin, ymax = (float(v) for v in extent)
    return xmin, xmax, ymin, ymax


def field_for_extent(lens: Lens, extent, resolution_arcsec: float) -> LensField:
    """The lens's cached reduced fields on nodes covering ``extent`` (arcsec) every
    ``resolution_arcsec`` (arcsec)."""
    xmin, xmax, ymin, ymax = _extent_box(extent)
    h = float(resolution_arcsec)
    nx = int(np.ceil((xmax - xmin) / h)) + 1
    ny = int(np.ceil((ymax - ymin) / h)) + 1
    return lens.field_on_grid(xmin, ymin, h, nx, ny)


@dataclass(frozen=True)
class CriticalCurves:
    """Critical curves (image plane) and caustics (source plane) for one source redshift.

    Attributes
    ----------
    z_source : float
    critical : list of ndarray (N, 2) (arcsec)
        Closed or open polylines of (xi, eta) where det A = 0.
    caustic : list of ndarray (N, 2) (arcsec)
        The same polylines mapped to the source plane.
    """

    z_source: float
    critical: list
    caustic: list


def _cell_triangles(cells, nx):
    """Flat vertex indices (3, 2 n) of the two triangles of each cell (flat index, row i of
    ``nx - 1`` cells)."""
    i, j = np.divmod(cells, nx - 1)
    v00 = i * nx + j
    v01 = v00 + 1
    v10 = v00 + nx
    v11 = v10 + 1
    return np.concatenate([np.stack([v00, v01, v11]), np.stack([v00, v11, v10])], axis=1)


def _cell_boxes(fld: LensField, r_lo: float, r_hi: float):
    """Source-plane bounding boxes of every cell for every ratio in [r_lo, r_hi].

    beta = theta - r alpha is linear in r, so the box spans the four vertices mapped with both
    ends of the ratio bin. Returns four (ny-1, nx-1) arrays: xmin, xmax, ymin, ymax (arcsec).
    """
    xs, ys = fld.node_positions()
    boxes = []
    for pos, al in ((xs, fld.ax), (ys, fld.ay)):
        a = (pos - r_lo * al).astype(np.float32)
        b = (pos - r_hi * al).astype(np.float32)
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        lo = np.minimum(np.minimum(lo[:-1, :-1], lo[1:, :-1]), np.minimum(lo[:-1, 1:], lo[1:, 1:]))
        hi = np.maximum(np.maximum(hi[:-1, :-1], hi[1:, :-1]), np.maximum(hi[:-1, 1:], hi[1:, 1:]))
        boxes += [lo, hi]
    return boxes


def _candidate_pairs(fld, r_lo, r_hi, bx, by, cell):
    """(cell, source) pairs whose source-plane bounding boxes overlap (flat cell indices)."""
    lo_x, hi_x, lo_y, hi_y = (b.ravel() for b in _cell_boxes(fld, r_lo, r_hi))
    # source-plane bins holding the sources, and a summed-area table of their counts
    x0, y0 = bx.min() - cell, by.min() - cell
    nbx = int((bx.max() - x0) / cell) + 2
    nby = int((by.max() - y0) / cell) + 2
    sbx = ((bx - x0) / cell).astype(np.int64)
    sby = ((by - y0) / cell).astype(np.int64)
    counts = np.zeros((nby, nbx), np.int64)
    np.add.at(counts, (sby, sbx), 1)
    sat = np.zeros((nby + 1, nbx + 1), np.int64)
    sat[1:, 1:] = counts.cumsum(0).cumsum(1)
    i0 = np.clip(np.floor((lo_x - x0) / cell).astype(np.int64), 0, nbx)
    i1 = np.clip(np.floor((hi_x - x0) / cell).astype(np.int64) + 1, 0, nbx)
    j0 = np.clip(np.floor((lo_y - y0) / cell).astype(np.int64), 0, nby)
    j1 = np.clip(np.floor((hi_y - y0) / cell).astype(np.int64) + 1, 0, nby)
    n_in = sat[j1, i1] - sat[j0, i1] - sat[j1, i0] + sat[j0, i0]
    cand = np.nonzero(n_in > 0)[0]
    if cand.size == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    i0, i1, j0, j1 = i0[cand], i1[cand], j0[cand], j1[cand]
    # expand each candidate cell over its bins, then each bin over its sources
    nb = (i1 - i0) * (j1 - j0)
    t_rep = np.repeat(cand, nb)
    k = np.arange(nb.sum()) - np.repeat(np.cumsum(nb) - nb, nb)
    w = np.repeat(i1 - i0, nb)
    bin_i = np.repeat(i0, nb) + k % w
    bin_j = np.repeat(j0, nb) + k // w
    flat = bin_j * nbx + bin_i
    key = sby * nbx + sbx
    order = np.argsort(key, kind="stable")
    src_flat = key[order]
    start = np.searchsorted(src_flat, flat, side="left")
    stop = np.searchsorted(src_flat, flat, side="right")
    ns = stop - start
    keep = ns > 0
    t_rep, start, ns = t_rep[keep], start[keep], ns[keep]
    t_pair = np.repeat(t_rep, ns)
    kk = np.arange(ns.sum()) - np.repeat(np.cumsum(ns) - ns, ns)
    s_pair = order[np.repeat(start, ns) + kk]
    return t_pair, s_pair


def _inside(px, py, sx, sy):
    """Barycentric weights (3, n) of points (px, py) in triangles (sx, sy) of shape (3, n)."""
    d = (sy[1] - sy[2]) * (sx[0] - sx[2]) + (sx[2] - sx[1]) * (sy[0] - sy[2])
    d = np.where(d == 0, 1e-300, d)
    l1 = ((sy[1] - sy[2]) * (px - sx[2]) + (sx[2] - sx[1]) * (py - sy[2])) / d
    l2 = ((sy[2] - sy[0]) * (px - sx[2]) + (sx[0] - sx[2]) * (py - sy[2])) / d
    return np.stack([l1, l2, 1.0 - l1 - l2])


def _newton(lens, x, y, bx, by, ratio, tol):
    """Refine image positions (x, y) of sources (bx, by) by Newton steps on the lens equation.

    Returns refined (x, y) and the final source-plane residual (arcsec).
    """
    x = x.copy()
    y = y.copy()
    res = np.full(x.shape, np.inf)
    for _ in range(_NEWTON_STEPS):
        ax, ay, k, g1, g2 = lens.reduced(x, y)
        fx = x - ratio * ax - bx
        fy = y - ratio * ay - by
        res = np.hypot(fx, fy)
        if np.all(res < tol):
            break
        a11 = 1.0 - ratio * (k + g1)
        a22 = 1.0 - ratio * (k - g1)
        a12 = -ratio * g2
        det = a11 * a22 - a12 * a12
        det = np.where(np.abs(det) < 1e-12, 1e-12, det)
        x -= (a22 * fx - a12 * fy) / det
        y -= (a11 * fy - a12 * fx) / det
    ax, ay, *_ = lens.reduced(x, y)
    res = np.hypot(x - ratio * ax - bx, y - ratio * ay - by)
    return x, y, res


def find_images(lens: Lens, beta_x, beta_y, z_s, extent_arcsec, resolution_arcsec: float = 0.1,
                tol_arcsec: float = 1e-6) -> Table:
    """All images of point sources inside ``extent_arcsec``.

    Parameters
    ----------
    lens : Lens
    beta_x, beta_y : array_like (arcsec)
        Source-plane positions (tangent-plane offsets).
    z_s : float or array_like
        Source redshifts; sources with z_s <= z_l get one image at the source position, mu = 1.
    extent_arcsec : float or (xmin, xmax, ymin, ymax) (arcsec)
        Image-plane region searched: a centred square of this side, or a box.
    resolution_arcsec : float (arcsec)
        Side of the triangle-mapping cells. Pairs of images closer than about this, near a
        critical curve, may be merged or missed.
    tol_arcsec : float (arcsec)
        Newton iteration stops when every source-plane residual is below this.

    Returns
    -------
    astropy.table.Table
        One row per image, sorted by source then decreasing |mu|: ``source`` (index into the
        inputs), ``x_arcsec``, ``y_arcsec`` (arcsec), ``mu`` (signed magnification),
        ``parity`` (+1 or -1), ``residual_arcsec`` (source-plane miss after refinement).
    """
    bx = np.atleast_1d(np.asarray(beta_x, dtype=float))
    by = np.atleast_1d(np.asarray(beta_y, dtype=float))
    zs = np.broadcast_to(np.asarray(z_s, dtype=float), bx.shape)
    ratio = np.atleast_1d(lens.distance_ratio(zs))
    fld = field_for_extent(lens, extent_arcsec, resolution_arcsec)
    h = fld.step
    vx, vy = (a.ravel() for a in fld.node_positions())
    ax, ay = fld.ax.ravel(), fld.ay.ravel()
    nx = fld.shape[1]

    out_src, out_x, out_y = [np.nonzero(ratio <= 0)[0]], [bx[ratio <= 0]], [by[ratio <= 0]]
    bg = np.nonzero(ratio > 0)[0]
    if bg.size:
        edges = np.arange(ratio[bg].min(), ratio[bg].max() + _RATIO_BIN, _RATIO_BIN)
        which = np.clip(np.searchsorted(edges, ratio[bg], side="right") - 1, 0, len(edges) - 1)
        for b in np.unique(which):
            src = bg[which == b]
            r_lo, r_hi = edges[b], edges[b] + _RATIO_BIN
            # source-plane bins about as large as a cell's box over the ratio bin
            pad = _RATIO_BIN * float(np.sqrt(fld.ax**2 + fld.ay**2).max())
            c_pair, s_loc = _candidate_pairs(fld, r_lo, r_hi, bx[src], by[src], h + pad)
            if c_pair.size == 0:
                continue
            s_pair = np.tile(src[s_loc], 2)
            vt = _cell_triangles(c_pair, nx)
            rr = ratio[s_pair]
            sx = vx[vt] - rr * ax[vt]
            sy = vy[vt] - rr * ay[vt]
            lam = _inside(bx[s_pair], by[s_pair], sx, sy)
            ok = np.all(lam >= -1e-9, axis=0)
            lam, vt, s_pair = lam[:, ok], vt[:, ok], s_pair[ok]
            out_src.append(s_pair)
            out_x.append((lam * vx[vt]).sum(axis=0))
            out_y.append((lam * vy[vt]).sum(axis=0))
    src = np.concatenate(out_src).astype(np.int64)
    x = np.concatenate(out_x)
    y = np.concatenate(out_y)
    r = ratio[src]
    lensed = r > 0
    res = np.zeros_like(x)
    if lensed.any():
        x0, y0 = x[lensed], y[lensed]
        xn, yn, rn = _newton(lens, x0, y0, bx[src[lensed]], by[src[lensed]], r[lensed],
                             tol_arcsec)
        # keep the refined position unless Newton wandered away from its triangle
        moved = np.hypot(xn - x0, yn - y0) > 2.0 * h
        xn = np.where(moved, x0, xn)
        yn = np.where(moved, y0, yn)
        axm, aym, *_ = lens.reduced(xn, yn)
        rn = np.hypot(xn - r[lensed] * axm - bx[src[lensed]],
                      yn - r[lensed] * aym - by[src[lensed]])
        x[lensed], y[lensed], res[lensed] = xn, yn, rn
    # drop spurious solutions (triangles straddling a singular centre) and duplicates from
    # triangles sharing the edge or vertex on which an image falls
    good = res < 0.5 * h
    src, x, y, res = src[good], x[good], y[good], res[good]
    order = np.lexsort((y, x, src))
    src, x, y, res = src[order], x[order], y[order], res[order]
    dup = np.zeros(src.size, bool)
    if src.size > 1:
        dup[1:] = ((src[1:] == src[:-1]) & (np.abs(x[1:] - x[:-1]) < 1e-4 * h + 1e-9)
                   & (np.abs(y[1:] - y[:-1]) < 1e-4 * h + 1e-9))
    src, x, y, res = src[~dup], x[~dup], y[~dup], res[~dup]
    r = ratio[src]
    _, _, k, g1, g2 = lens.reduced(x, y)
    det = (1.0 - r * k) ** 2 - (r * g1) ** 2 - (r * g2) ** 2
    with np.errstate(divide="ignore"):
        mu = 1.0 / det
    order = np.lexsort((-np.abs(mu), src))
    tab = Table({"source": src[order], "x_arcsec": x[order], "y_arcsec": y[order],
                 "mu": mu[order], "parity": np.where(det[order] >= 0, 1, -1).astype(np.int16),
                 "residual_arcsec": res[order]})
    tab["x_arcsec"].unit = tab["y_arcsec"].unit = tab["residual_arcsec"].unit = "arcsec"
    tab.meta["extent_arcsec"] = list(_extent_box(extent_arcsec))
    tab.meta["resolution_arcsec"] = float(h)
    return tab


def critical_curves(lens: Lens, z_s: float, extent_arcsec, resolution_arcsec: float = 0.05
                    ) -> CriticalCurves:
    """Critical curves (det A = 0) and caustics for sources at ``z_s``.

    Parameters
    ----------
    lens : Lens
    z_s : float
        Source redshift.
    extent_arcsec : float or (xmin, xmax, ymin, ymax) (arcsec)
    resolution_arcsec : float (arcsec)
        Sampling of det A; curves around galaxy-scale lenses need a few samples per Einstein
        radius.
    """
    import contourpy

    r = lens.distance_ratio(z_s)
    fld = field_for_extent(lens, extent_arcsec, resolution_arcsec)
    if r <= 0:
        return CriticalCurves(float(z_s), [], [])
    det = (1 - r * fld.kappa) ** 2 - (r * fld.gamma1) ** 2 - (r * fld.gamma2) ** 2
    xs, ys = fld.node_positions()
    gen = contourpy.contour_generator(xs, ys, det, line_type=contourpy.LineType.Separate)
    # curves no larger than two samples are artefacts of sampling a singular centre
    crit = [np.asarray(c, float) for c in gen.lines(0.0)
            if len(c) > 2 and np.ptp(c, axis=0).max() > 2 * fld.step]
    caus = []
    for c in crit:
        sx, sy = lens.source_position(c[:, 0], c[:, 1], z_s)
        caus.append(np.column_stack([sx, sy]))
    return CriticalCurves(float(z_s), crit, caus)


def write_lens_png(lens: Lens, path, extent_arcsec=100.0, resolution_arcsec: float = 0.05,
                   z_s: float | None = None, seed: int | None = None, field_arcsec=None):
    """Save a picture of the convergence map with critical curves and caustics, the field
    outline (and the margin around it the map covers), the halo centres, a scale bar in arcsec
    and kpc (at the lens redshift) and N/E arrows (xi east, eta north); returns the (closed)
    Figure.

    Parameters
    ----------
    lens : Lens
    path : str or path-like
        Output PNG.
    extent_arcsec : float or (xmin, xmax, ymin, ymax) (arcsec)
        Area of the map.
    resolution_arcsec : float (arcsec)
    z_s : float, optional
        Source redshift; defaults to ``lens.reference_redshift``.
    seed : int, optional
        The run's seed, for the title.
    field_arcsec : float or (xmin, xmax, ymin, ymax) (arcsec), optional
        The field (a run's mosaic footprint), outlined as "field"; where it is smaller than
        the map, the map's edge is outlined as the margin. Defaults to the map's extent.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm

    z_s = lens.reference_redshift if z_s is None else float(z_s)
    cc = critical_curves(lens, z_s, extent_arcsec, resolution_arcsec)
    fld = field_for_extent(lens, extent_arcsec, resolution_arcsec)
    kappa = lens.distance_ratio(z_s) * fld.kappa
    xmin, xmax, ymin, ymax = _extent_box(extent_arcsec)
    fig, ax = plt.subplots(figsize=(7, 6.6), layout="constrained")
    pos = kappa[kappa > 0]
    vmin = max(np.percentile(pos, 1), 1e-3) if pos.size else 1e-3
    vmax = max(min(np.percentile(kappa, 99.9), 10.0), 2 * vmin)  # singular centres aside
    im = ax.imshow(np.clip(kappa, vmin, vmax), origin="lower", cmap="Greys",
                   extent=(xmin, xmax, ymin, ymax), norm=LogNorm(vmin=vmin, vmax=vmax))
    for i, c in enumerate(cc.critical):
        ax.plot(c[:, 0], c[:, 1], color="tab:red", lw=0.8,
                label="critical curve" if i == 0 else None)
    for i, c in enumerate(cc.caustic):
        ax.plot(c[:, 0], c[:, 1], color="tab:blue", lw=0.6,
                label="caustic" if i == 0 else None)
    ax.set_xlim(xmax, xmin)  # east to the left
    ax.set_ylim(ymin, ymax)
    ax.set_xlabel("xi (arcsec, east)")
    ax.set_ylabel("eta (arcsec, north)")
    ax.set_title(f"convergence, critical curves, caustics\nz_l = {lens.redshift:g}, "
                 f"z_s = {z_s:g}" + (f", seed {seed}" if seed is not None else ""), fontsize=10)
    from matplotlib.patches import Rectangle
    from matplotlib.ticker import LogLocator, ScalarFormatter

    from .._plot import compass, scale_bar
    fx0, fx1, fy0, fy1 = _extent_box(extent_arcsec if field_arcsec is None else field_arcsec)
    ax.add_patch(Rectangle((fx0, fy0), fx1 - fx0, fy1 - fy0, fill=False, ec="tab:green",
                           lw=1.5, ls="--", gid="field",
                           label="field" if field_arcsec is None else "field (mosaic)"))
    margin = max(fx0 - xmin, xmax - fx1, fy0 - ymin, ymax - fy1)
    if margin > 1e-9:
        # the map's edge: sources are drawn over the field plus this margin
        ax.add_patch(Rectangle((xmin, ymin), xmax - xmin, ymax - ymin, fill=False, ec="0.45",
                               lw=1.0, ls=":", gid="margin",
                               label=f'field + {margin:.3g}" margin (sources drawn)'))
    from .profiles import TruncatedSIS

    halos = [c for c in lens.components if hasattr(c, "x0") and not isinstance(c, TruncatedSIS)]
    members = [c for c in lens.components if isinstance(c, TruncatedSIS)]
    if members:
        ax.plot([c.x0 for c in members], [c.y0 for c in members], ".", color="tab:orange",
                ms=3, label="member lenses")
    if halos:
        ax.plot([c.x0 for c in halos], [c.y0 for c in halos], "x", color="tab:orange", ms=11,
                mew=2.5, label="halo centre")
    pad = 0.04 * max(xmax - xmin, ymax - ymin)  # so the outlines show inside the axes
    ax.set_xlim(xmax + pad, xmin - pad)
    ax.set_ylim(ymin - pad, ymax + pad)
    # physical scale at the lens redshift (the lens's astropy cosmology, kpc per arcsec)
    kpc_per_arcsec = float(lens.cosmo.kpc_proper_per_arcmin(lens.redshift).value) / 60
    side = xmax - xmin
    bar = float(f"{side / 5:.0g}")
    scale_bar(ax, bar, f'{bar:g}" = {bar * kpc_per_arcsec:.0f} kpc at z_l', colour="k")
    compass(ax, (0.0, 1.0), (1.0, 0.0), colour="k")  # eta north, xi east (data axes)
    cb = fig.colorbar(im, ax=ax, label="convergence kappa (dimensionless)")
    cb.ax.yaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
    cb.ax.yaxis.set_major_formatter(ScalarFormatter())
    cb.ax.yaxis.set_minor_formatter(ScalarFormatter())
    cb.ax.yaxis.set_minor_locator(LogLocator(subs=()))
    # below the axes, off the map
    fig.legend(loc="outside lower center", ncol=3, fontsize=8)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return fig
