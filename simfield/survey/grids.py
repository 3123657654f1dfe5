"""Grids, dither pattern, exposure grids and sampling of the scene on detector pixels.

Every grid shares the field centre as tangent point, so a dither is a shift of the detector
grid on the tangent plane and every mapping between grids is affine (see the package
docstring)."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from ..config import SurveyConfig, TelescopeConfig
from ..errors import check_range, require
from ..grid import Grid
from ..pixelops import box_sum

# R2 low-discrepancy sequence (Roberts 2018, "The unreasonable effectiveness of quasirandom
# sequences" [mem]): phases k/g, k/g^2 mod 1 with g the plastic number, g^3 = g + 1.
_PLASTIC = 1.324717957244746
_R2 = (1.0 / _PLASTIC, 1.0 / _PLASTIC**2)
_POINTING_CLIP = 4.0  # pointing errors are clipped at this many sigma so the margins hold
_PAD_PIX = 4  # spare detector / scene pixels around every footprint



def _spiral(n: int) -> np.ndarray:
    """First ``n`` points (integer steps) of a square spiral around (0, 0), shape (n, 2)."""
    pts = [(0, 0)]
    x = y = 0
    step, d = 1, 0
    dirs = ((1, 0), (0, 1), (-1, 0), (0, -1))
    while len(pts) < n:
        for _ in range(2):
            dx, dy = dirs[d % 4]
            for _ in range(step):
                x, y = x + dx, y + dy
                pts.append((x, y))
            d += 1
        step += 1
    return np.array(pts[:n], dtype=float)


def _nominal_offsets(survey: SurveyConfig, telescope: TelescopeConfig) -> np.ndarray:
    """Dither offsets (xi, eta) in arcsec without pointing errors, shape (n_exposures, 2)."""
    n = survey.n_exposures
    # the large steps are whole detector pixels, so the sub-pixel phases are the R2 ones alone
    # (a step of 12.5 pixels would add half a pixel to some exposures and clump the phases)
    pix = telescope.pixel_scale_arcsec
    big = _spiral(n) * round(survey.dither_step_arcsec / pix) * pix
    k = np.arange(n)[:, None]
    sub = (k * np.array(_R2)) % 1.0 * telescope.pixel_scale_arcsec
    off = big + sub
    return off - off.mean(axis=0) if n > 1 else off * 0.0


def _max_offset(survey: SurveyConfig, telescope: TelescopeConfig) -> float:
    """Bound on |xi0|, |eta0| of any exposure (arcsec)."""
    nominal = np.abs(_nominal_offsets(survey, telescope)).max()
    return float(nominal + _POINTING_CLIP * survey.pointing_rms_arcsec)


def _detector_size(survey: SurveyConfig, telescope: TelescopeConfig) -> tuple[int, int]:
    """(nx, ny) detector pixels that cover the field from every dither position."""
    t = math.radians(survey.roll_deg)
    c, s = abs(math.cos(t)), abs(math.sin(t))
    w, h = survey.width_arcsec, survey.height_arcsec
    m = 2 * _max_offset(survey, telescope) * (c + s)
    p = telescope.pixel_scale_arcsec
    nx = math.ceil((w * c + h * s + m) / p) + 2 * _PAD_PIX
    ny = math.ceil((w * s + h * c + m) / p) + 2 * _PAD_PIX
    return nx, ny


def scene_grid(survey: SurveyConfig, telescope: TelescopeConfig) -> Grid:
    """The oversampled scene grid, north up, covering every detector pixel of every exposure.

    Parameters
    ----------
    survey : SurveyConfig
    telescope : TelescopeConfig

    Returns
    -------
    Grid
        Scale ``telescope.pixel_scale_arcsec / survey.scene_oversample`` (arcsec/pixel).
    """
    check_range("survey.scene_oversample", survey.scene_oversample, 1, 8)
    scale = telescope.pixel_scale_arcsec / survey.scene_oversample
    nx, ny = _detector_size(survey, telescope)
    t = math.radians(survey.roll_deg)
    c, s = abs(math.cos(t)), abs(math.sin(t))
    p = telescope.pixel_scale_arcsec
    half_w = (nx * c + ny * s) * p / 2 + _max_offset(survey, telescope)
    half_h = (nx * s + ny * c) * p / 2 + _max_offset(survey, telescope)
    return Grid(nx=2 * math.ceil(half_w / scale) + 2 * _PAD_PIX,
                ny=2 * math.ceil(half_h / scale) + 2 * _PAD_PIX,
                scale=scale, ra0=survey.ra_deg, dec0=survey.dec_deg)


def mosaic_grid(survey: SurveyConfig) -> Grid:
    """The mosaic grid: the field at ``survey.mosaic_pixel_arcsec`` (arcsec/pixel), north up."""
    check_range("survey.mosaic_pixel_arcsec", survey.mosaic_pixel_arcsec, 0.001, 10)
    p = survey.mosaic_pixel_arcsec
    return Grid(nx=max(1, round(survey.width_arcsec / p)), ny=max(1, round(survey.height_arcsec / p)),
                scale=p, ra0=survey.ra_deg, dec0=survey.dec_deg)


def dither_offsets(survey: SurveyConfig, telescope: TelescopeConfig,
                   rng: np.random.Generator) -> np.ndarray:
    """Pointing of each exposure as a tangent-plane offset (xi0, eta0) in arcsec.

    A square spiral of step ``survey.dither_step_arcsec`` (large offsets, to move bad pixels and
    cosmic-ray holes around) plus sub-pixel phases from the R2 sequence (so the exposures sample
    the detector pixel evenly), centred on the field, plus a known random pointing error of rms
    ``survey.pointing_rms_arcsec`` per axis (clipped at 4 sigma).

    Returns
    -------
    ndarray, shape (n_exposures, 2) (arcsec)
    """
    off = _nominal_offsets(survey, telescope)
    err = rng.normal(0.0, 1.0, off.shape).clip(-_POINTING_CLIP, _POINTING_CLIP)
    return off + err * survey.pointing_rms_arcsec


def exposure_grids(survey: SurveyConfig, telescope: TelescopeConfig,
                   rng: np.random.Generator) -> list[Grid]:
    """One detector grid per exposure (see :func:`dither_offsets`), each covering the field.

    Parameters
    ----------
    survey, telescope : SurveyConfig, TelescopeConfig
    rng : numpy.random.Generator
        Draws the pointing errors.

    Returns
    -------
    list of Grid
        Scale ``telescope.pixel_scale_arcsec`` (arcsec/pixel), roll ``survey.roll_deg`` (deg).
    """
    check_range("survey.n_exposures", survey.n_exposures, 1, 1000)
    nx, ny = _detector_size(survey, telescope)
    return [Grid(nx=nx, ny=ny, scale=telescope.pixel_scale_arcsec, ra0=survey.ra_deg,
                 dec0=survey.dec_deg, roll_deg=survey.roll_deg, xi0=float(x), eta0=float(y))
            for x, y in dither_offsets(survey, telescope, rng)]


def _affine(src: Grid, dst: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Matrix A (2x2) and offset b with dst_pixel = A @ src_pixel + b (0-based (x, y))."""
    require(abs(src.ra0 - dst.ra0) < 1e-12 and abs(src.dec0 - dst.dec0) < 1e-12, "grid.ra0/dec0",
            (src.ra0, src.dec0, dst.ra0, dst.dec0), "grids must share one tangent point")
    px = np.array([0.0, 1.0, 0.0])
    py = np.array([0.0, 0.0, 1.0])
    qx, qy = dst.offsets_to_pixel(*src.pixel_to_offsets(px, py))
    b = np.array([qx[0], qy[0]])
    a = np.array([[qx[1] - qx[0], qx[2] - qx[0]], [qy[1] - qy[0], qy[2] - qy[0]]])
    return a, b


# --------------------------------------------------------------------------------------------
# sampling the scene on detector pixels
# --------------------------------------------------------------------------------------------
def _is_aligned(a: np.ndarray) -> bool:
    """True for an affine matrix that only scales each axis (positive, no rotation)."""
    return abs(a[0, 1]) < 1e-9 and abs(a[1, 0]) < 1e-9 and a[0, 0] > 0 and a[1, 1] > 0


def sample_scene(scene: np.ndarray, scene_grid: Grid, exp_grid: Grid, modes=None,
                 coeffs=None) -> np.ndarray:
    """Integrate the scene over every detector pixel of one exposure.

    Parameters
    ----------
    scene : ndarray (e-/s per scene pixel), shape ``scene_grid.shape``
        Noiseless, PSF-convolved scene without sky.
    scene_grid, exp_grid : Grid
        Grids of the scene and of the exposure (same tangent point).
    modes : ndarray (e-/s per scene pixel), shape (K, *scene.shape), optional
    coeffs : ndarray (dimensionless), shape (K,), optional
        The scene integrated is then ``max(scene + sum_k coeffs[k] modes[k], 0)`` (e.g. the
        exposure's own PSF change), formed in the scene's type, without a copy in the
        aligned case.

    Returns
    -------
    ndarray of float32 (e-/s per detector pixel), shape ``exp_grid.shape``

    Notes
    -----
    With the same roll and an integer scale ratio ``o`` (the default) the result is the exact
    integral of the piecewise-constant scene over each (shifted) detector pixel: a box sum of
    ``o x o`` scene pixels with fractional weights on the edge rows and columns. Otherwise each
    detector pixel averages ``k x k`` bilinear samples of the scene surface brightness
    (``k = ceil(ratio)``), which conserves flux to the interpolation's accuracy (<0.1% on smooth
    scenes). Detector pixels outside the scene see zero.
    """
    scene = np.asarray(scene)
    require(scene.shape == scene_grid.shape, "scene", scene.shape,
            f"must have the scene grid's shape {scene_grid.shape}")
    a, b = _affine(exp_grid, scene_grid)
    ratio = exp_grid.scale / scene_grid.scale
    o = round(ratio)
    if _is_aligned(a) and abs(ratio - o) < 1e-9:
        # detector pixel x covers scene edge coordinates [o x + b - o/2 + 1/2, ... + o]
        ex = b[0] - o / 2 + 0.5
        ey = b[1] - o / 2 + 0.5
        x0, y0 = math.floor(ex), math.floor(ey)
        fx, fy = ex - x0, ey - y0
        return box_sum(scene, y0, exp_grid.ny, x0, exp_grid.nx, o, fy, fx, modes, coeffs)
    if modes is not None and len(modes):
        scene = scene.copy()
        for c, d in zip(np.asarray(coeffs, scene.dtype), modes):
            scene += c * d
        np.maximum(scene, 0.0, out=scene)
    return _sample_general(np.asarray(scene, dtype=float), a, b, exp_grid, ratio)


def _sample_general(scene, a, b, exp_grid: Grid, ratio: float, chunk: int = 256) -> np.ndarray:
    """Average of k x k bilinear samples per detector pixel times the pixel-area ratio."""
    k = max(1, math.ceil(ratio - 1e-9))
    sub = (np.arange(k) + 0.5) / k - 0.5
    out = np.empty(exp_grid.shape)
    xs = np.arange(exp_grid.nx, dtype=float)
    for y_lo in range(0, exp_grid.ny, chunk):
        ys = np.arange(y_lo, min(exp_grid.ny, y_lo + chunk), dtype=float)
        acc = np.zeros((ys.size, xs.size))
        for dy in sub:
            for dx in sub:
                yy, xx = np.meshgrid(ys + dy, xs + dx, indexing="ij")
                sx = a[0, 0] * xx + a[0, 1] * yy + b[0]
                sy = a[1, 0] * xx + a[1, 1] * yy + b[1]
                acc += ndimage.map_coordinates(scene, [sy, sx], order=1, mode="constant",
                                               cval=0.0, prefilter=False)
        out[y_lo:y_lo + ys.size] = acc
    # surface brightness (per scene pixel) x detector pixel area (in scene pixels) / samples
    return (out * (ratio * ratio) / (k * k)).astype(np.float32)
