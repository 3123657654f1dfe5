"""Dither pattern, exposure grids, sampling of the scene on detector pixels, drizzled mosaics
and depths.

Every grid shares the field centre (``survey.ra_deg``, ``survey.dec_deg``) as tangent point, so
a dither is a shift ``(xi0, eta0)`` of the detector grid on the tangent plane and every mapping
between grids is affine (exact for a TAN WCS with a common tangent point). A real pointing
offset would also move the tangent point; over a field of a few arcmin the difference is far
below a milliarcsecond and is neglected (common practice for small fields).

Grids (see :mod:`simfield.grid` for the pixel convention, 0-based, centre of pixel (0, 0) at
``x = y = 0``):

- scene grid: ``telescope.pixel_scale_arcsec / survey.scene_oversample`` per pixel, north up,
  covering the field plus every detector pixel of every dither;
- exposure grids: one per exposure, detector pixels (``telescope.pixel_scale_arcsec``), rolled by
  ``survey.roll_deg``, each covering the whole field;
- mosaic grid: ``survey.mosaic_pixel_arcsec``, north up, exactly the field.

Images are in e-/s per pixel of their grid. DQ bits of the mosaic (the same values as
:mod:`simfield.detector`, checked in the tests) are the module constants ``DQ_*``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .config import DetectorConfig, SurveyConfig, TelescopeConfig
from .errors import check_range, require
from .grid import Grid

__all__ = [
    "DQ_HOT",
    "DQ_DEAD",
    "DQ_COSMIC_RAY",
    "DQ_SATURATED",
    "DQ_NO_COVERAGE",
    "DQ_NO_SLOPE",
    "DQ_EXCLUDE",
    "dq_header_cards",
    "Mosaic",
    "scene_grid",
    "mosaic_grid",
    "dither_offsets",
    "exposure_grids",
    "sample_scene",
    "drizzle_mosaic",
    "mosaic_hdus",
    "ramp_variance_rauscher",
    "predicted_depth",
    "measured_depth",
    "aperture_sums",
    "depth_from_sums",
    "MIN_EMPTY_APERTURES",
    "Tile",
    "plan_tiles",
    "owned_pixels",
]

#: DQ bit: hot pixel (high dark current), excluded from the mosaic.
DQ_HOT = 1
#: DQ bit: dead pixel (no response), excluded.
DQ_DEAD = 2
#: DQ bit: cosmic-ray jump found in the ramp; the slope comes from the longest clean segment
#: (kept, with its larger variance).
DQ_COSMIC_RAY = 4
#: DQ bit: saturated before the end of the ramp; slope from the unsaturated groups (kept).
DQ_SATURATED = 8
#: DQ bit (mosaic only): no unflagged exposure pixel covers this mosaic pixel.
DQ_NO_COVERAGE = 16
#: DQ bit: fewer than two usable groups, no slope (excluded).
DQ_NO_SLOPE = 32
#: Exposure pixels with any of these bits get zero weight in the drizzle.
DQ_EXCLUDE = DQ_HOT | DQ_DEAD | DQ_NO_SLOPE


def dq_header_cards() -> list[tuple[str, int, str]]:
    """(FITS key, bit value, comment) of every DQ bit, as written in the header of each DQ
    extension: the key is ``DQ`` and the bit's name without underscores, cut to the 8
    characters of a FITS keyword (``DQHOT``, ``DQNOCOVE``, ...)."""
    bits = [("DQ_HOT", "hot pixel (excluded)"), ("DQ_DEAD", "dead pixel (excluded)"),
            ("DQ_COSMIC_RAY", "cosmic-ray jump, clean segment kept"),
            ("DQ_SATURATED", "saturated late in ramp, early groups kept"),
            ("DQ_NO_COVERAGE", "no coverage"), ("DQ_NO_SLOPE", "no usable slope (excluded)")]
    return [(("DQ" + name[3:].replace("_", ""))[:8], globals()[name], comment)
            for name, comment in bits]


# R2 low-discrepancy sequence (Roberts 2018, "The unreasonable effectiveness of quasirandom
# sequences" [mem]): phases k/g, k/g^2 mod 1 with g the plastic number, g^3 = g + 1.
_PLASTIC = 1.324717957244746
_R2 = (1.0 / _PLASTIC, 1.0 / _PLASTIC**2)
_POINTING_CLIP = 4.0  # pointing errors are clipped at this many sigma so the margins hold
_PAD_PIX = 4  # spare detector / scene pixels around every footprint


# --------------------------------------------------------------------------------------------
# grids and dithers
# --------------------------------------------------------------------------------------------
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
    big = _spiral(n) * survey.dither_step_arcsec
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
def _box_sum_rows(img: np.ndarray, start: int, n: int, o: int, f: float) -> np.ndarray:
    """Sums over boxes of o rows starting at fractional row edge ``start + f``, n boxes.

    Box k covers row edges [start + f + o k, start + f + o (k + 1)]: weights (1 - f) on row
    start + o k, 1 on the o - 1 rows after it and f on row start + o (k + 1); exact integral of
    a piecewise-constant image. Rows outside ``img`` count as zero.
    """
    need_lo, need_hi = start, start + o * n + 1
    pad_lo, pad_hi = max(0, -need_lo), max(0, need_hi - img.shape[0])
    a = img[max(0, need_lo):min(img.shape[0], need_hi)]
    if pad_lo or pad_hi:
        a = np.pad(a, ((pad_lo, pad_hi), (0, 0)))
    out = (1.0 - f) * a[0:o * n:o]
    for j in range(1, o):
        out += a[j:o * n:o]
    if f > 0:
        out += f * a[o:o * n + 1:o]
    return out


def sample_scene(scene: np.ndarray, scene_grid: Grid, exp_grid: Grid) -> np.ndarray:
    """Integrate the scene over every detector pixel of one exposure.

    Parameters
    ----------
    scene : ndarray (e-/s per scene pixel), shape ``scene_grid.shape``
        Noiseless, PSF-convolved scene without sky.
    scene_grid, exp_grid : Grid
        Grids of the scene and of the exposure (same tangent point).

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
    scene = np.asarray(scene, dtype=float)
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
        rows = _box_sum_rows(scene, y0, exp_grid.ny, o, fy)
        return np.ascontiguousarray(_box_sum_rows(rows.T, x0, exp_grid.nx, o, fx).T,
                                    dtype=np.float32)
    return _sample_general(scene, a, b, exp_grid, ratio)


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


# --------------------------------------------------------------------------------------------
# drizzle
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Mosaic:
    """A drizzled mosaic on a mosaic grid.

    Attributes
    ----------
    sci : ndarray (e-/s per mosaic pixel)
        Weighted mean of the exposures (sky subtracted if asked), 0 where not covered.
    wht : ndarray ((e-/s)^-2)
        Inverse variance of ``sci`` per pixel (from the exposures' variances; ignores the
        pixel-to-pixel correlation drizzle introduces), 0 where not covered.
    exp : ndarray (s)
        Summed exposure time of the exposures that contribute.
    dq : ndarray (int32 bit mask)
        OR of the DQ bits of contributing (kept) exposure pixels, plus ``DQ_NO_COVERAGE``.
    """

    sci: np.ndarray
    wht: np.ndarray
    exp: np.ndarray
    dq: np.ndarray


def _is_aligned(a: np.ndarray) -> bool:
    """True for an affine matrix that only scales each axis (positive, no rotation)."""
    return abs(a[0, 1]) < 1e-9 and abs(a[1, 0]) < 1e-9 and a[0, 0] > 0 and a[1, 1] > 0


def _pixmap(src: Grid, dst: Grid) -> np.ndarray:
    """(ny, nx, 2) map of src pixel centres to dst pixel coordinates (0-based)."""
    a, b = _affine(src, dst)
    x = np.arange(src.nx, dtype=float)[None, :]
    y = np.arange(src.ny, dtype=float)[:, None]
    pm = np.empty(src.shape + (2,))
    pm[..., 0] = a[0, 0] * x + a[0, 1] * y + b[0]
    pm[..., 1] = a[1, 0] * x + a[1, 1] * y + b[1]
    return pm


def drizzle_mosaic(exposures, exp_grids: list[Grid], mosaic_grid: Grid, kernel: str = "square",
                   pixfrac: float = 0.8, subtract_sky: bool = True) -> Mosaic:
    """Drizzle exposures onto the mosaic grid (Fruchter & Hook 2002, PASP 114, 144).

    Parameters
    ----------
    exposures : iterable of simfield.detector.Exposure
        Consumed one at a time (a generator keeps only one exposure in memory). Each with ``sci`` (e-/s), ``var`` ((e-/s)^2), ``var_sky`` ((e-/s)^2, variance of a
        source-free pixel), ``dq``, ``exptime`` (s) and ``sky`` (e-/s per pixel).
    exp_grids : list of Grid
        The exposures' grids (same tangent point as ``mosaic_grid``).
    mosaic_grid : Grid
    kernel : str
        Drizzle kernel: square, point, turbo, gaussian, lanczos3 (the last two do not conserve
        flux).
    pixfrac : float
        Linear size of the drop relative to the input pixel (0, 1].
    subtract_sky : bool
        Subtract each exposure's nominal sky level before combining.

    Returns
    -------
    Mosaic

    Notes
    -----
    Input pixels are weighted by 1/var_sky (inverse-variance weights that do not depend on the
    sources, so they do not bias source fluxes), and pixels with any ``DQ_EXCLUDE`` bit get
    weight 0. Input rates are scaled by (mosaic pixel / detector pixel)^2 so ``sci`` is in e-/s
    per mosaic pixel and sums to the same total flux. The variance of ``sci`` is drizzled with
    squared weights: var = sum(w^2 a^2 var_i) / (sum w a)^2, and ``wht = 1 / var``.
    """
    from drizzle.resample import Drizzle

    require(kernel in ("square", "point", "turbo", "gaussian", "lanczos3"), "survey.drizzle_kernel",
            kernel, "must be one of: square, point, turbo, gaussian, lanczos3")
    check_range("survey.pixfrac", pixfrac, 0, 1, lo_open=True)
    require(len(exp_grids) > 0, "exp_grids", len(exp_grids), "must not be empty")
    aligned = all(_is_aligned(_affine(g, mosaic_grid)[0]) for g in exp_grids)
    # with the exposure axes along the mosaic axes the square drop is an axis-aligned square,
    # which the turbo kernel computes exactly and ~3x faster (checked in the tests)
    driz = Drizzle(kernel="turbo" if kernel == "square" and aligned else kernel,
                   out_shape=mosaic_grid.shape, fillval=0.0, fillval2=0.0,
                   max_ctx_id=len(exp_grids) - 1)
    exptimes = []
    for k, e in enumerate(exposures):
        require(k < len(exp_grids), "exposures", k + 1,
                f"must be as many as exp_grids ({len(exp_grids)})")
        g = exp_grids[k]
        exptimes.append(float(e.exptime))
        require(e.sci.shape == g.shape, "exposure.sci", e.sci.shape,
                f"must have its grid's shape {g.shape}")
        ratio = mosaic_grid.scale / g.scale
        var_sky = np.asarray(getattr(e, "var_sky", e.var), dtype=np.float32)
        good = ((e.dq & DQ_EXCLUDE) == 0) & (var_sky > 0)
        with np.errstate(divide="ignore"):
            w = np.where(good, np.float32(1.0) / var_sky, np.float32(0.0))
        sci = e.sci - np.float32(getattr(e, "sky", 0.0)) if subtract_sky else e.sci
        driz.add_image(np.asarray(sci, np.float32), exptime=float(e.exptime),
                       pixmap=_pixmap(g, mosaic_grid), data2=np.asarray(e.var, np.float32),
                       dq=np.asarray(e.dq, np.uint32), iscale=ratio * ratio,
                       pixel_scale_ratio=ratio, weight_map=w, pixfrac=pixfrac, in_units="cps")
    require(len(exptimes) == len(exp_grids), "exposures", len(exptimes),
            f"must be as many as exp_grids ({len(exp_grids)})")
    sci = np.asarray(driz.out_img, dtype=np.float32)
    var = np.asarray(driz.out_img2[0] if isinstance(driz.out_img2, list) else driz.out_img2,
                     dtype=np.float32)
    covered = np.asarray(driz.out_wht) > 0
    with np.errstate(divide="ignore"):
        wht = np.where(covered & (var > 0), np.float32(1.0) / var, np.float32(0.0))
    ctx = np.asarray(driz.out_ctx)
    ctx = ctx.reshape((-1,) + mosaic_grid.shape).astype(np.uint32)
    exp = np.zeros(mosaic_grid.shape, np.float32)
    for i, t in enumerate(exptimes):
        exp += ((ctx[i // 32] >> np.uint32(i % 32)) & np.uint32(1)) * np.float32(t)
    dq = np.zeros(mosaic_grid.shape, np.int32) if driz.out_dq is None else \
        np.asarray(driz.out_dq).astype(np.int32)
    dq[~covered] |= DQ_NO_COVERAGE
    sci[~covered] = 0.0
    return Mosaic(sci=sci, wht=wht, exp=exp, dq=dq)


def mosaic_hdus(mosaic: Mosaic, grid: Grid, band: str = "", zeropoint: float | None = None,
                header: dict | None = None) -> list:
    """FITS HDUs of a mosaic: an empty primary and SCI, WHT, EXP, DQ image extensions.

    Parameters
    ----------
    mosaic : Mosaic
    grid : Grid
        The mosaic grid (its TAN WCS goes into every extension).
    band : str
        Band name (keyword BAND).
    zeropoint : float or None (AB mag)
        AB magnitude of 1 e-/s (keyword ZP_AB).
    header : dict or None
        Extra primary-header keywords (e.g. provenance), names of at most 8 characters.

    Returns
    -------
    list of astropy.io.fits HDUs
    """
    from astropy.io import fits

    prim = fits.PrimaryHDU()
    for k, v in (header or {}).items():
        prim.header[k] = v
    if band:
        prim.header["BAND"] = (band, "band name")
    if zeropoint is not None:
        prim.header["ZP_AB"] = (float(zeropoint), "AB mag of 1 e-/s")
    prim.header["EXPTIME"] = (float(mosaic.exp.max()) if mosaic.exp.size else 0.0,
                              "[s] maximum summed exposure time")
    wcs_header = grid.wcs.to_header()
    units = {"SCI": ("electron/s", mosaic.sci.astype(np.float32)),
             "WHT": ("s2/electron2", mosaic.wht.astype(np.float32)),
             "EXP": ("s", mosaic.exp.astype(np.float32)),
             "DQ": ("", mosaic.dq.astype(np.int32))}
    hdus = [prim]
    for name, (unit, data) in units.items():
        h = fits.ImageHDU(data=data, header=wcs_header.copy(), name=name)
        if unit:
            h.header["BUNIT"] = unit
        if name == "DQ":
            for key, bit, comment in dq_header_cards():
                h.header[key] = (bit, comment)
        h.header["EXPTIME"] = (float(mosaic.exp.max()) if mosaic.exp.size else 0.0,
                               "[s] maximum summed exposure time")
        hdus.append(h)
    return hdus


# --------------------------------------------------------------------------------------------
# depth
# --------------------------------------------------------------------------------------------
def ramp_variance_rauscher(rate, read_noise_frame_e: float, n_groups: int, n_frames: int,
                           t_frame_s: float):
    """Variance of the fitted up-the-ramp slope, (e-/s)^2.

    Rauscher et al. 2007, PASP 119, 768, eq. 1 (no dropped frames, t_g = m t_f), for the
    total counts over the slope baseline (n - 1) t_g, divided by ((n - 1) t_g)^2::

        s^2 = 12 (n-1) / (m n (n+1)) sr^2 + 6 (n^2+1) / (5 n (n+1)) (n-1) t_g f
              - 2 (m^2-1) (n-1) / (m n (n+1)) t_f f

    Parameters
    ----------
    rate : float or ndarray (e-/s)
        Photo-current plus dark current.
    read_noise_frame_e : float (e-)
        Read noise of one frame (CDS noise / sqrt(2)).
    n_groups, n_frames : int
    t_frame_s : float (s)
    """
    n, m = n_groups, n_frames
    tg = m * t_frame_s
    f = np.asarray(rate, dtype=float)
    s2 = (12.0 * (n - 1) / (m * n * (n + 1)) * read_noise_frame_e**2
          + 6.0 * (n * n + 1) / (5.0 * n * (n + 1)) * (n - 1) * tg * f
          - 2.0 * (m * m - 1) * (n - 1) / (m * n * (n + 1)) * t_frame_s * f)
    return s2 / ((n - 1) * tg) ** 2


def predicted_depth(det: DetectorConfig, exptime_s: float, n_exposures: int, zeropoint: float,
                    sky_rate: float, pixel_arcsec: float, aperture_radius_arcsec: float,
                    encircled_energy: float = 1.0, nsigma: float = 5.0) -> float:
    """Point-source depth (AB mag) at ``nsigma`` from the noise model.

    Parameters
    ----------
    det : DetectorConfig
        Read noise, dark current and ramp (switches ``read_noise``, ``dark_current``,
        ``poisson`` are honoured).
    exptime_s : float (s)
        Effective exposure time of one exposure, (n_groups - 1) x group time.
    n_exposures : int
        Equal exposures combined.
    zeropoint : float (AB mag)
        AB magnitude of 1 e-/s.
    sky_rate : float (e-/s per detector pixel)
    pixel_arcsec : float (arcsec)
        Detector pixel side.
    aperture_radius_arcsec : float (arcsec)
    encircled_energy : float
        Fraction of a point source's flux inside the aperture (from the PSF).
    nsigma : float

    Returns
    -------
    float (AB mag)
        The total magnitude of a point source whose aperture flux has S/N = ``nsigma``.

    Notes
    -----
    Per exposure the aperture (n_pix = pi r^2 / p^2 pixels) has variance
    n_pix (a sr^2 + b (sky + dark)) + b F, with a and b the read and shot-noise factors of
    Rauscher et al. 2007 eq. 1 (:func:`ramp_variance_rauscher`); N exposures divide it by N.
    S/N = F / sqrt(var / N) = nsigma is solved for F exactly (quadratic). IPC moves charge
    between pixels but not out of an aperture and is ignored here.
    """
    check_range("n_exposures", n_exposures, 1, None)
    check_range("encircled_energy", encircled_energy, 0, 1, lo_open=True)
    check_range("aperture_radius_arcsec", aperture_radius_arcsec, 0, None, lo_open=True)
    tf = exptime_s / ((det.n_groups - 1) * det.n_frames)
    sr = det.read_noise_e / math.sqrt(2.0) if det.read_noise else 0.0
    a = float(ramp_variance_rauscher(0.0, sr, det.n_groups, det.n_frames, tf))
    b = float(ramp_variance_rauscher(1.0, 0.0, det.n_groups, det.n_frames, tf)) \
        if det.poisson else 0.0
    dark = det.dark_e_s if det.dark_current else 0.0
    npix = math.pi * aperture_radius_arcsec**2 / pixel_arcsec**2
    bkg = npix * (a + b * (sky_rate + dark)) / n_exposures
    shot = b / n_exposures
    k2 = nsigma * nsigma
    # F^2 = k^2 (bkg + shot F)  ->  F = (k^2 shot + sqrt(k^4 shot^2 + 4 k^2 bkg)) / 2
    f_ap = 0.5 * (k2 * shot + math.sqrt(k2 * k2 * shot * shot + 4.0 * k2 * bkg))
    return float(zeropoint - 2.5 * math.log10(f_ap / encircled_energy))


def measured_depth(mosaic: Mosaic, grid: Grid, zeropoint: float, aperture_radius: float,
                   rng: np.random.Generator, mask: np.ndarray | None = None,
                   n_apertures: int = 2000, encircled_energy: float = 1.0,
                   nsigma: float = 5.0) -> float:
    """Depth (AB mag) from the scatter of aperture sums placed at random on empty sky.

    Parameters
    ----------
    mosaic : Mosaic
    grid : Grid
        The mosaic grid.
    zeropoint : float (AB mag)
        AB magnitude of 1 e-/s.
    aperture_radius : float (arcsec)
    rng : numpy.random.Generator
        Draws the aperture centres.
    mask : ndarray of bool or None, shape ``grid.shape``
        True on sources (e.g. a dilated segmentation map); apertures touching it are dropped,
        as are apertures touching uncovered pixels.
    n_apertures : int
        Candidate apertures drawn.
    encircled_energy : float
        Point-source aperture correction, as in :func:`predicted_depth`.
    nsigma : float

    Returns
    -------
    float (AB mag)
        ``zeropoint - 2.5 log10(nsigma * sigma / encircled_energy)`` with sigma the robust
        (1.4826 x median absolute deviation) scatter of the aperture sums (e-/s); see
        :func:`aperture_sums` and :func:`depth_from_sums`, which a tiled run uses tile by tile.
    """
    check_range("aperture_radius", aperture_radius, 0, None, lo_open=True)
    bad = (mosaic.wht <= 0)
    if mask is not None:
        require(np.shape(mask) == grid.shape, "mask", np.shape(mask),
                f"must have the grid's shape {grid.shape}")
        bad = bad | np.asarray(mask, dtype=bool)
    sums = aperture_sums(mosaic.sci, bad, aperture_radius / grid.scale, rng, n_apertures)
    return depth_from_sums(sums, zeropoint, encircled_energy, nsigma)


def aperture_sums(sci: np.ndarray, bad: np.ndarray, radius_pix: float,
                  rng: np.random.Generator, n_apertures: int) -> np.ndarray:
    """Sums (e-/s) of circular apertures dropped at random on ``sci`` away from ``bad`` pixels.

    Parameters
    ----------
    sci : ndarray (e-/s per pixel)
    bad : ndarray of bool, shape of ``sci``
        Sources and uncovered pixels; apertures touching them are dropped.
    radius_pix : float (pixels)
    rng : numpy.random.Generator
        Draws the aperture centres (uniform, kept ``radius_pix + 1`` from the edges).
    n_apertures : int
        Candidate apertures drawn.

    Returns
    -------
    ndarray (e-/s)
        One sum per kept aperture (possibly none).
    """
    from photutils.aperture import CircularAperture, aperture_photometry

    ny, nx = sci.shape
    lo = radius_pix + 1
    if n_apertures <= 0 or nx - 1 - lo <= lo or ny - 1 - lo <= lo:
        return np.zeros(0)
    x = rng.uniform(lo, nx - 1 - lo, n_apertures)
    y = rng.uniform(lo, ny - 1 - lo, n_apertures)
    pos = np.column_stack([x, y])
    hit = aperture_photometry(np.asarray(bad, float), CircularAperture(pos, radius_pix + 0.5),
                              method="center")["aperture_sum"]
    keep = np.asarray(hit) == 0
    if not keep.any():
        return np.zeros(0)
    return np.asarray(aperture_photometry(np.asarray(sci), CircularAperture(pos[keep], radius_pix),
                                          method="exact")["aperture_sum"], float)


#: Fewest empty-sky apertures a measured depth is given from.
MIN_EMPTY_APERTURES = 20


def depth_from_sums(sums: np.ndarray, zeropoint: float, encircled_energy: float = 1.0,
                    nsigma: float = 5.0) -> float:
    """Depth (AB mag) from empty-aperture sums (e-/s): the robust sigma (1.4826 x MAD) at
    ``nsigma``, corrected by the point-source ``encircled_energy``."""
    sums = np.asarray(sums, float)
    require(sums.size >= MIN_EMPTY_APERTURES, "mask", int(sums.size),
            f"leaves fewer than {MIN_EMPTY_APERTURES} empty apertures: mask less or use a "
            "larger field")
    sigma = 1.4826 * np.median(np.abs(sums - np.median(sums)))
    return float(zeropoint - 2.5 * math.log10(nsigma * sigma / encircled_energy))


# --------------------------------------------------------------------------------------------
# tiles
# --------------------------------------------------------------------------------------------
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
