"""Cutting the mosaic into tiles and finding the windows of the other grids that feed each."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import check_range
from ..grid import Grid
from .grids import _PAD_PIX, _affine


@dataclass(frozen=True, eq=False)
class Tile:
    """One tile of the mosaic and the windows of the other grids that feed it.

    Boxes are (y0, y1, x0, x1), 0-based pixel indices with exclusive ends.

    Attributes
    ----------
    index : (int, int)
        Tile row and column.
    mosaic : box
        The tile's mosaic pixels (tiles partition the mosaic).
    mgrid : Grid
        The mosaic grid's window on ``mosaic``.
    exposures : list of box
        Per exposure, the detector pixels that can drop light on the tile (plus a pad for
        inter-pixel capacitance and cosmic-ray tracks); for tiles on the mosaic edge, out to the
        detector edge, so every detector pixel belongs to some tile (:func:`owned_pixels`).
    egrids : list of Grid
        The exposure grids' windows on those boxes.
    scene : box
        Scene pixels under every exposure window (plus a pad).
    sgrid : Grid
        The scene grid's window on ``scene``.
    """

    index: tuple[int, int]
    mosaic: tuple[int, int, int, int]
    mgrid: Grid
    exposures: list
    egrids: list
    scene: tuple[int, int, int, int]
    sgrid: Grid


def _edges(n: int, size: int) -> list[int]:
    """Cuts of n pixels into ceil(n / size) nearly equal parts."""
    k = max(1, math.ceil(n / size))
    return [round(i * n / k) for i in range(k + 1)]


def _tile_box_corners(box, n_y: int, n_x: int, far: float) -> np.ndarray:
    """Corners (x, y) (pixel-edge coordinates) of a mosaic box; sides on the mosaic edge are
    pushed ``far`` pixels out so edge tiles also claim what lies beyond the mosaic."""
    y0, y1, x0, x1 = box
    lx = x0 - 0.5 if x0 > 0 else -far
    hx = x1 - 0.5 if x1 < n_x else n_x + far
    ly = y0 - 0.5 if y0 > 0 else -far
    hy = y1 - 0.5 if y1 < n_y else n_y + far
    return np.array([[lx, ly], [hx, ly], [lx, hy], [hx, hy]], float)


def _map(points: np.ndarray, src: Grid, dst: Grid) -> np.ndarray:
    a, b = _affine(src, dst)
    return points @ a.T + b


def plan_tiles(mgrid: Grid, egrids: list[Grid], sgrid: Grid, tile_pixels: int,
               pad_pix: int = _PAD_PIX, align: int = 4) -> list[Tile]:
    """Cut the mosaic into tiles of about ``tile_pixels`` x ``tile_pixels`` mosaic pixels.

    Parameters
    ----------
    mgrid, egrids, sgrid : Grid
        Mosaic, exposure and scene grids (one tangent point).
    tile_pixels : int (mosaic pixels)
        Largest tile side; the mosaic is cut into ceil(n / tile_pixels) nearly equal parts
        along each axis.
    pad_pix : int (pixels)
        Spare detector pixels around each exposure window and scene pixels around the scene
        window (a drizzle drop, inter-pixel capacitance and a cosmic-ray track reach < 4).
    align : int (scene pixels)
        Scene windows start on multiples of this, so lensing node grids (every 4 scene
        pixels) coincide between tiles.

    Returns
    -------
    list of Tile, row by row
    """
    check_range("tile_pixels", tile_pixels, 16, None)
    far = 2.0 * max(max(g.nx, g.ny) * g.scale for g in egrids + [sgrid]) / mgrid.scale
    tiles = []
    ey, ex = _edges(mgrid.ny, tile_pixels), _edges(mgrid.nx, tile_pixels)
    for ty in range(len(ey) - 1):
        for tx in range(len(ex) - 1):
            box = (ey[ty], ey[ty + 1], ex[tx], ex[tx + 1])
            corners = _tile_box_corners(box, mgrid.ny, mgrid.nx, far)
            wins, grids, scene_pts = [], [], []
            for g in egrids:
                p = _map(corners, mgrid, g)
                x0 = max(0, math.floor(p[:, 0].min() + 0.5) - pad_pix)
                x1 = min(g.nx, math.ceil(p[:, 0].max() + 0.5) + pad_pix)
                y0 = max(0, math.floor(p[:, 1].min() + 0.5) - pad_pix)
                y1 = min(g.ny, math.ceil(p[:, 1].max() + 0.5) + pad_pix)
                wins.append((y0, y1, x0, x1))
                grids.append(g.window(x0, y0, x1 - x0, y1 - y0))
                edge = np.array([[x0 - 0.5, y0 - 0.5], [x1 - 0.5, y0 - 0.5],
                                 [x0 - 0.5, y1 - 0.5], [x1 - 0.5, y1 - 0.5]])
                scene_pts.append(_map(edge, g, sgrid))
            q = np.concatenate(scene_pts)
            sx0 = max(0, (math.floor(q[:, 0].min() + 0.5) - pad_pix) // align * align)
            sx1 = min(sgrid.nx, math.ceil(q[:, 0].max() + 0.5) + pad_pix)
            sy0 = max(0, (math.floor(q[:, 1].min() + 0.5) - pad_pix) // align * align)
            sy1 = min(sgrid.ny, math.ceil(q[:, 1].max() + 0.5) + pad_pix)
            tiles.append(Tile(index=(ty, tx), mosaic=box,
                              mgrid=mgrid.window(box[2], box[0], box[3] - box[2], box[1] - box[0]),
                              exposures=wins, egrids=grids, scene=(sy0, sy1, sx0, sx1),
                              sgrid=sgrid.window(sx0, sy0, sx1 - sx0, sy1 - sy0)))
    return tiles


def owned_pixels(tile: Tile, k: int, mgrid: Grid) -> np.ndarray:
    """Bool image over the tile's window of exposure ``k``: True on the detector pixels this
    tile writes to the exposure file, those whose centre falls (after clipping onto the mosaic)
    in the tile's mosaic box, so the tiles of a run write every detector pixel exactly once."""
    g = tile.egrids[k]
    y, x = np.mgrid[0:g.ny, 0:g.nx]
    pts = _map(np.column_stack([x.ravel(), y.ravel()]).astype(float), g, mgrid)
    px = np.clip(np.floor(pts[:, 0] + 0.5), 0, mgrid.nx - 1)
    py = np.clip(np.floor(pts[:, 1] + 0.5), 0, mgrid.ny - 1)
    y0, y1, x0, x1 = tile.mosaic
    return ((px >= x0) & (px < x1) & (py >= y0) & (py < y1)).reshape(g.shape)
