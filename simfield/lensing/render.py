"""Drawing lensed sources into the image plane, surface brightness conserved.

Lensing conserves surface brightness: the image-plane brightness at theta is the source's at
beta = theta - alpha(theta) (Schneider, Ehlers & Falco 1992, section 5.1). Two paths:

- **ray tracing** (multiple images, arcs, strong gradients): scene pixel centres, supersampled,
  are mapped to the source plane with the reduced deflection interpolated bilinearly from a
  node grid every few scene pixels, and the source's brightness is read there from a finely
  drawn image of its profile;
- **local weak lensing** (one image, nearly constant Jacobian over it): the source's profile is
  transformed by the inverse Jacobian A^-1 at the image position (GalSim ``transform``, which
  keeps surface brightness, so the flux becomes |mu|) and drawn like an unlensed source.

Which path a source takes is decided from the image-plane cells that can see it: any negative
parity there (so more than one image), |mu| above ``mu_max`` or a Jacobian that changes by more
than ``jacobian_tol`` across them send it to ray tracing.

GalSim profiles are in arcsec with x along xi (east) and y along eta (north), the convention of
:func:`simfield.population.morphology.make_profile`; stamps are on the scene grid (see
:mod:`simfield.grid`), flux per scene pixel for unit intrinsic flux.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.table import Table
from scipy import ndimage

from ..grid import Grid
from .images import find_images
from .raytrace import Lens

__all__ = ["RenderCache", "render_cache", "render_lensed", "lens_sources", "source_radius",
           "source_plane_bounds", "forget_grid"]

_BLOCK = 4  # scene pixels per node-grid cell (deflection interpolated in between)
_SUPER = 8  # node-grid cells per side of a search superblock
_MAX_SOURCE_RADIUS = 5.0  # arcsec; profiles are cut at this radius
_CORE_CELLS = 3  # cells this close to a singular centre are ray traced exactly


@dataclass(frozen=True, eq=False)
class RenderCache:
    """Reduced lensing fields on the nodes of a scene grid, and their superblock ranges.

    Node (i, j) sits at scene pixel coordinates x = -0.5 + B j, y = -0.5 + B i (pixel
    corners, B = ``block`` pixels); arrays are indexed [i, j].
    """

    grid: Grid
    block: int
    xi: np.ndarray  #: node xi (arcsec)
    eta: np.ndarray  #: node eta (arcsec)
    ax: np.ndarray  #: reduced deflection (arcsec)
    ay: np.ndarray
    kappa: np.ndarray  #: reduced convergence
    gamma1: np.ndarray  #: reduced shear, (xi, eta) frame
    gamma2: np.ndarray
    sup: dict  #: superblock min/max of xi, eta, ax, ay (arrays per key)
    lens: Lens  #: the lens, for exact deflections next to singular centres
    cores: np.ndarray  #: (n, 2) centres (arcsec) of singular components (SIS, SIE, point)


def render_cache(lens: Lens, grid: Grid, block: int = _BLOCK) -> RenderCache:
    """Reduced fields on the node grid of ``grid`` (cached on the lens, one per grid)."""
    key = ("render", grid, block)
    if key in lens._cache:
        return lens._cache[key]
    nbx = -(-grid.nx // block)
    nby = -(-grid.ny // block)
    nsx = -(-nbx // _SUPER)
    nsy = -(-nby // _SUPER)
    # nodes padded to whole superblocks so the superblock ranges are plain reshapes
    jj = np.arange(nsx * _SUPER + 1)
    ii = np.arange(nsy * _SUPER + 1)
    px, py = np.meshgrid(-0.5 + block * jj, -0.5 + block * ii)
    xi, eta = grid.pixel_to_offsets(px, py)
    fields = [np.empty(xi.shape) for _ in range(5)]
    rows = max(1, 300_000 // xi.shape[1])
    for i in range(0, xi.shape[0], rows):
        for a, v in zip(fields, lens.reduced(xi[i:i + rows], eta[i:i + rows])):
            a[i:i + rows] = v
    ax, ay, kap, g1, g2 = fields
    sup = {}
    for name, arr in (("xi", xi), ("eta", eta), ("ax", ax), ("ay", ay)):
        lo = np.minimum(arr[:-1], arr[1:])
        lo = np.minimum(lo[:, :-1], lo[:, 1:]).reshape(nsy, _SUPER, nsx, _SUPER)
        hi = np.maximum(arr[:-1], arr[1:])
        hi = np.maximum(hi[:, :-1], hi[:, 1:]).reshape(nsy, _SUPER, nsx, _SUPER)
        sup[name] = (lo.min(axis=(1, 3)), hi.max(axis=(1, 3)))
    cores = np.array([(c.x0, c.y0) for c in lens.components
                      if hasattr(c, "theta_e") or hasattr(c, "theta_e_sq")]).reshape(-1, 2)
    cache = RenderCache(grid, block, xi, eta, ax, ay, kap, g1, g2, sup, lens, cores)
    lens._cache[key] = cache
    return cache


def source_plane_bounds(lens: Lens, grid: Grid, block: int = _BLOCK):
    """(xi_lo, xi_hi, eta_lo, eta_hi) (arcsec) holding the source-plane position of every
    scene-grid node for every source redshift: beta = theta - r alpha with 0 <= r <= 1, so the
    extremes are at r = 0 or r = 1. A source farther than its radius outside this box has no
    light on ``grid``."""
    c = render_cache(lens, grid, block)
    bx = (np.minimum(c.xi, c.xi - c.ax), np.maximum(c.xi, c.xi - c.ax))
    by = (np.minimum(c.eta, c.eta - c.ay), np.maximum(c.eta, c.eta - c.ay))
    return float(bx[0].min()), float(bx[1].max()), float(by[0].min()), float(by[1].max())


def forget_grid(lens: Lens, grid: Grid) -> None:
    """Drop the node fields cached on ``lens`` for ``grid`` (a finished tile's window)."""
    for key in [k for k in lens._cache if isinstance(k, tuple) and len(k) > 1
                and k[0] == "render" and k[1] == grid]:
        del lens._cache[key]


def source_radius(profile) -> float:
    """Radius (arcsec) outside which ``profile`` has negligible light: pi / stepk.

    For truncated profiles GalSim's stepk puts this at the truncation radius; capped at 5".
    """
    return float(min(np.pi / profile.stepk, _MAX_SOURCE_RADIUS))


def _candidate_blocks(cache: RenderCache, r: float, bx: float, by: float, radius: float):
    """Node-grid cells whose source-plane bounding box meets the disc (bx, by, radius).

    Returns the cells' row and column indices and their corners' source-plane positions
    (each (4, n), corners ordered [i, j], [i+1, j], [i, j+1], [i+1, j+1]; arcsec).
    """
    s = cache.sup
    lo_x = s["xi"][0] - r * s["ax"][1]
    hi_x = s["xi"][1] - r * s["ax"][0]
    lo_y = s["eta"][0] - r * s["ay"][1]
    hi_y = s["eta"][1] - r * s["ay"][0]
    dx = np.maximum(np.maximum(lo_x - bx, bx - hi_x), 0.0)
    dy = np.maximum(np.maximum(lo_y - by, by - hi_y), 0.0)
    si, sj = np.nonzero(dx * dx + dy * dy <= radius * radius)
    if si.size == 0:
        e = np.zeros(0, np.int64)
        return e, e, np.zeros((4, 0)), np.zeros((4, 0))
    # every cell of the candidate superblocks, tested with its own four corners
    oi, oj = np.mgrid[0:_SUPER, 0:_SUPER]
    ci = (si[:, None, None] * _SUPER + oi).ravel()
    cj = (sj[:, None, None] * _SUPER + oj).ravel()
    corners = [(ci, cj), (ci + 1, cj), (ci, cj + 1), (ci + 1, cj + 1)]
    sx = np.stack([cache.xi[c] - r * cache.ax[c] for c in corners])
    sy = np.stack([cache.eta[c] - r * cache.ay[c] for c in corners])
    dx = np.maximum(np.maximum(sx.min(0) - bx, bx - sx.max(0)), 0.0)
    dy = np.maximum(np.maximum(sy.min(0) - by, by - sy.max(0)), 0.0)
    ok = dx * dx + dy * dy <= radius * radius
    return ci[ok], cj[ok], sx[:, ok], sy[:, ok]


def _subsamples(size: float, scale: float, most: int) -> int:
    """Samples per pixel side for an image whose smallest radius is ``size`` (arcsec): about
    20 samples across it, at most ``most`` (common practice)."""
    return int(np.clip(np.ceil(20.0 * scale / max(size, 1e-6)), 1, most))


def _interp_point(cache: RenderCache, x: float, y: float):
    """Bilinear (ax, ay, kappa, gamma1, gamma2) (reduced) at (x, y) (arcsec)."""
    px, py = cache.grid.offsets_to_pixel(x, y)
    fi = (float(py) + 0.5) / cache.block
    fj = (float(px) + 0.5) / cache.block
    ny, nx = cache.ax.shape
    i0 = int(np.clip(np.floor(fi), 0, ny - 2))
    j0 = int(np.clip(np.floor(fj), 0, nx - 2))
    wy, wx = min(max(fi - i0, 0.0), 1.0), min(max(fj - j0, 0.0), 1.0)
    out = []
    for f in (cache.ax, cache.ay, cache.kappa, cache.gamma1, cache.gamma2):
        q = f[i0:i0 + 2, j0:j0 + 2]
        out.append((q[0, 0] * (1 - wx) + q[0, 1] * wx) * (1 - wy)
                   + (q[1, 0] * (1 - wx) + q[1, 1] * wx) * wy)
    return out


def _weak_image(cache, r, bx, by, ci, cj, sx, sy):
    """Single-image position (arcsec) and Jacobian A by Newton steps on interpolated fields."""
    # start from the candidate cell whose centre maps closest to the source
    k = int(np.argmin((sx.mean(0) - bx) ** 2 + (sy.mean(0) - by) ** 2))
    corners = [(ci[k], cj[k]), (ci[k] + 1, cj[k]), (ci[k], cj[k] + 1), (ci[k] + 1, cj[k] + 1)]
    x = float(np.mean([cache.xi[c] for c in corners]))
    y = float(np.mean([cache.eta[c] for c in corners]))
    for _ in range(10):
        ax, ay, kap, g1, g2 = _interp_point(cache, x, y)
        fx, fy = x - r * ax - bx, y - r * ay - by
        a = np.array([[1 - r * (kap + g1), -r * g2], [-r * g2, 1 - r * (kap - g1)]])
        dx, dy = np.linalg.solve(a, [fx, fy])
        x, y = x - dx, y - dy
        if abs(dx) + abs(dy) < 1e-7:
            break
    return x, y, a


def _draw_weak(profile, grid: Grid, x: float, y: float, a: np.ndarray, supersample: int,
               radius: float):
    """Stamp of ``profile`` transformed by A^-1 (flux |mu|) centred at (x, y) (arcsec).

    The stamp holds the image of the source disc of ``radius`` (arcsec): its half-size is
    ``radius`` times the largest singular value of A^-1.
    """
    jac = np.linalg.inv(a)
    # image-plane brightness S(A theta): transform by A^-1 (GalSim keeps surface brightness)
    # then map (xi, eta) onto scene (column, row) axes
    full = grid.pixel_frame() @ jac
    lensed = profile.transform(full[0, 0], full[0, 1], full[1, 0], full[1, 1])
    mu = abs(np.linalg.det(jac))
    px, py = grid.offsets_to_pixel(x, y)
    px, py = float(px), float(py)
    s_max, s_min = np.linalg.svd(jac, compute_uv=False)
    half = int(np.clip(np.ceil(radius * s_max / grid.scale) + 1, 3, 256))
    ix, iy = int(round(px)), int(round(py))
    n = 2 * half + 1
    m = _subsamples(radius * s_min, grid.scale, supersample)
    img = lensed.drawImage(nx=n * m, ny=n * m, scale=grid.scale / m, method="no_pixel",
                           offset=((px - ix) * m, (py - iy) * m)).array
    stamp = img.reshape(n, m, n, m).sum(axis=(1, 3))
    tot = stamp.sum()
    if tot > 0:
        stamp *= mu / tot  # keep the flux a truncated profile or a finite stamp would lose
    return [(stamp.astype(np.float32), iy - half, ix - half)]


def _source_image(profile, radius: float, scale: float):
    """Surface brightness (per arcsec^2) of ``profile`` sampled every ``scale`` (arcsec)."""
    n = int(2 * np.ceil(radius / scale) + 3)
    n = min(n, 2049)
    img = profile.drawImage(nx=n, ny=n, scale=scale, method="no_pixel").array
    return img / scale**2, (n - 1) / 2.0  # galsim centres odd images on the central pixel


def _sample_weights(block: int, m: int) -> np.ndarray:
    """Bilinear weights (4, (block m)^2) of a cell's corners at its pixels' subsamples."""
    u = (np.arange(block * m) + 0.5) / (block * m)  # fractional node coordinate in the cell
    uy, ux = np.meshgrid(u, u, indexing="ij")
    w = np.stack([(1 - uy) * (1 - ux), uy * (1 - ux), (1 - uy) * ux, uy * ux])
    return w.reshape(4, -1)


def _near_cores(cache, ci, cj, r, w, sx, sy):
    """Exact source-plane positions of subsamples in cells next to singular centres.

    Bilinear interpolation fails where the deflection turns direction around an isothermal
    or point-mass centre, so cells within ``_CORE_CELLS`` cells of one are traced exactly.
    """
    if cache.cores.size == 0:
        return sx.T @ w, sy.T @ w
    corners = [(ci, cj), (ci + 1, cj), (ci, cj + 1), (ci + 1, cj + 1)]
    cx = np.stack([cache.xi[c] for c in corners])
    cy = np.stack([cache.eta[c] for c in corners])
    mx, my = cx.mean(0), cy.mean(0)
    reach = _CORE_CELLS * cache.block * cache.grid.scale
    d2 = (mx[:, None] - cache.cores[:, 0]) ** 2 + (my[:, None] - cache.cores[:, 1]) ** 2
    near = np.nonzero((d2 < reach * reach).any(axis=1))[0]
    u, v = sx.T @ w, sy.T @ w
    if near.size:
        tx, ty = cx[:, near].T @ w, cy[:, near].T @ w
        ax, ay, *_ = cache.lens.reduced(tx, ty)
        u[near], v[near] = tx - r * ax, ty - r * ay
    return u, v


def _ray_trace(cache, profile, r, bx, by, radius, ci, cj, sx, sy, supersample, source_scale):
    """Stamps by ray tracing the scene pixels of the candidate node cells.

    Inside a cell the deflection is bilinear, so the source-plane position of every subsample
    is a fixed linear combination of the cell's four mapped corners.
    """
    g = cache.grid
    # source-plane sample spacing can reach ~1.5 x the image-plane one
    b = cache.block
    m = _subsamples(radius / 1.5, g.scale, supersample)
    sb, c0 = _source_image(profile, radius, source_scale)
    w = _sample_weights(b, m)
    u, v = _near_cores(cache, ci, cj, r, w, sx, sy)
    u = (u - bx) / source_scale + c0
    v = (v - by) / source_scale + c0
    val = ndimage.map_coordinates(sb, np.array([v.ravel(), u.ravel()]), order=1,
                                  mode="constant", cval=0.0)
    flux = val.reshape(len(ci), b, m, b, m).mean(axis=(2, 4)) * g.scale**2
    # one stamp per connected group of cells
    i0, j0 = ci.min(), cj.min()
    mask = np.zeros((ci.max() - i0 + 1, cj.max() - j0 + 1), bool)
    mask[ci - i0, cj - j0] = True
    labels, _ = ndimage.label(ndimage.binary_dilation(mask, np.ones((3, 3), bool)),
                              np.ones((3, 3), int))
    lab = labels[ci - i0, cj - j0]
    stamps = []
    for k in np.unique(lab):
        sel = lab == k
        li, lj = ci[sel], cj[sel]
        a0, b0 = li.min(), lj.min()
        st = np.zeros((li.max() - a0 + 1, b, lj.max() - b0 + 1, b), np.float32)
        st[li - a0, :, lj - b0, :] = flux[sel]
        st = st.reshape((li.max() - a0 + 1) * b, (lj.max() - b0 + 1) * b)
        if st.any():
            stamps.append((st, int(a0 * b), int(b0 * b)))
    return stamps


def render_lensed(lens: Lens, profile, beta_x: float, beta_y: float, z_s: float, grid: Grid,
                  *, supersample: int = 3, mu_max: float = 4.0, jacobian_tol: float = 0.1,
                  force_ray_trace: bool = False, block: int = _BLOCK):
    """Lensed stamps of one source on the scene grid.

    Parameters
    ----------
    lens : Lens
    profile : galsim.GSObject
        Unit-flux intrinsic (source-plane) profile, arcsec, x along xi and y along eta.
    beta_x, beta_y : float (arcsec)
        Source-plane position.
    z_s : float
        Source redshift; sources with z_s <= z_l are drawn unlensed.
    grid : simfield.grid.Grid
        Scene grid.
    supersample : int
        Samples per scene pixel side.
    mu_max : float
        Single images with |mu| above this are ray traced.
    jacobian_tol : float
        Single images over which A changes by more than this (any element) are ray traced.
    force_ray_trace : bool
        Ray trace whatever the source.
    block : int
        Scene pixels per side of the node-grid cells on which the deflection is computed
        exactly (bilinear in between).

    Returns
    -------
    list of (ndarray (float32), int, int)
        ``(image, iy0, ix0)``: flux per scene pixel for unit intrinsic flux (their sum is the
        total magnification |mu| for a small source) and the 0-based scene row and column of
        ``image[0, 0]``. Empty if no image falls on the grid.
    """
    r = lens.distance_ratio(z_s)
    radius = max(source_radius(profile), 0.5 * grid.scale)
    if r <= 0:
        a = np.eye(2)
        return _draw_weak(profile, grid, beta_x, beta_y, a, supersample, radius)
    cache = render_cache(lens, grid, block)
    ci, cj, sx, sy = _candidate_blocks(cache, r, beta_x, beta_y, radius)
    if ci.size == 0:
        return []
    source_scale = min(0.5 * grid.scale, radius / 8.0)
    if not force_ray_trace:
        nodes = (np.concatenate([ci, ci + 1, ci, ci + 1]),
                 np.concatenate([cj, cj, cj + 1, cj + 1]))
        kap = r * cache.kappa[nodes]
        g1 = r * cache.gamma1[nodes]
        g2 = r * cache.gamma2[nodes]
        det = (1 - kap) ** 2 - g1**2 - g2**2
        spread = max(np.ptp(kap + g1), np.ptp(kap - g1), np.ptp(g2))
        # positive parity wherever the source could be seen: no negative-parity image, hence a
        # single image (odd-number theorem, SEF 1992; an isothermal centre removes the central
        # one but its counter-image has negative parity)
        weak = det.min() > 1.0 / mu_max and spread < jacobian_tol
        if weak:
            x, y, a = _weak_image(cache, r, beta_x, beta_y, ci, cj, sx, sy)
            return _draw_weak(profile, grid, x, y, a, supersample, radius)
    return _ray_trace(cache, profile, r, beta_x, beta_y, radius, ci, cj, sx, sy, supersample,
                      source_scale)


def lens_sources(lens: Lens, sources: Table, lens_cfg=None, x_range=(-50.0, 50.0),
                 y_range=(-50.0, 50.0), resolution_arcsec: float = 0.1):
    """Point-source images of every source, for the truth tables.

    Parameters
    ----------
    lens : Lens
    sources : astropy.table.Table
        Columns x_arcsec, y_arcsec (source-plane, arcsec), redshift; ``id`` if present.
    lens_cfg : LensConfig, optional
        Unused beyond documentation of the run (kept for a uniform stage signature).
    x_range, y_range : (float, float) (arcsec)
        Image-plane box searched for images.
    resolution_arcsec : float (arcsec)
        Triangle-mapping cell (see :func:`simfield.lensing.images.find_images`).

    Returns
    -------
    images : astropy.table.Table
        One row per image: source_id, image (0 = brightest), x_arcsec, y_arcsec (arcsec),
        magnification (signed), parity.
    total_magnification : ndarray
        Sum of |mu| over each source's images inside the box (0 if none).
    n_images : ndarray (int)
        Images of each source inside the box.
    """
    n = len(sources)
    ids = np.asarray(sources["id"]) if "id" in sources.colnames else np.arange(1, n + 1)
    extent = (x_range[0], x_range[1], y_range[0], y_range[1])
    tab = find_images(lens, np.asarray(sources["x_arcsec"], float),
                      np.asarray(sources["y_arcsec"], float),
                      np.asarray(sources["redshift"], float), extent, resolution_arcsec)
    src = np.asarray(tab["source"], np.int64)
    mu = np.asarray(tab["mu"], float)
    n_images = np.bincount(src, minlength=n).astype(np.int32)
    total = np.bincount(src, weights=np.abs(mu), minlength=n)
    first = np.r_[0, np.cumsum(n_images)[:-1]]
    rank = np.arange(len(src)) - first[src]
    images = Table()
    images["source_id"] = ids[src]
    images["image"] = rank.astype(np.int16)
    images["x_arcsec"] = np.asarray(tab["x_arcsec"], float)
    images["y_arcsec"] = np.asarray(tab["y_arcsec"], float)
    images["magnification"] = mu
    images["parity"] = np.asarray(tab["parity"], np.int16)
    images["x_arcsec"].unit = images["y_arcsec"].unit = "arcsec"
    return images, total, n_images
