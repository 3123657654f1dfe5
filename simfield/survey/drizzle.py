"""Drizzling exposures into a mosaic (Fruchter & Hook 2002, PASP 114, 144) and the
mosaic's flags."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import check_range, require
from ..grid import Grid
from .grids import _affine, _is_aligned

# Exposure flags: the detector's bits (the same values as :mod:`simfield.detector`, checked in
# the tests; stages do not import each other).
#: hot pixel (known from the calibration dark), excluded from the mosaic
DQ_HOT = 1
#: dead pixel (no response), excluded
DQ_DEAD = 2
#: cosmic-ray jump found in the ramp; slope from the longest clean segment (kept)
DQ_COSMIC_RAY = 4
#: saturated before the end of the ramp; slope from the unsaturated groups (kept)
DQ_SATURATED = 8
#: fewer than two usable groups, no slope (excluded)
DQ_NO_SLOPE = 32
#: one of the four IPC neighbours of a hot or dead pixel (excluded)
DQ_BAD_NEIGHBOUR = 64
#: Exposure pixels with any of these bits get zero weight in the drizzle.
DQ_EXCLUDE = DQ_HOT | DQ_DEAD | DQ_NO_SLOPE | DQ_BAD_NEIGHBOUR

# Mosaic flags: what a mosaic pixel's value rests on. Each mosaic pixel is judged from the
# exposure pixel nearest to its centre in every exposure that covers it.
#: no exposure contributed (no coverage, or every covering pixel excluded): value 0, weight 0
MOSAIC_NO_DATA = 1
#: fewer than half of the exposures covering the pixel contributed (noisier, less robust)
MOSAIC_FEW_EXPOSURES = 2
#: saturated in at least one covering exposure (ramp cut short, or left out): flux here is
#: from fewer groups or exposures, or missing
MOSAIC_SATURATED = 4
#: every contributing exposure had a repaired cosmic-ray jump here
MOSAIC_CR_ONLY = 8

_EXPOSURE_BITS = [("DQ_HOT", "FHOT", "hot pixel (excluded)"),
                  ("DQ_DEAD", "FDEAD", "dead pixel (excluded)"),
                  ("DQ_COSMIC_RAY", "FCOSMIC", "cosmic-ray jump, clean segment kept"),
                  ("DQ_SATURATED", "FSATUR", "saturated in the ramp, early groups kept"),
                  ("DQ_NO_SLOPE", "FNOSLOPE", "no usable slope (excluded)"),
                  ("DQ_BAD_NEIGHBOUR", "FBADNEI", "IPC neighbour of a bad pixel (excluded)")]
_MOSAIC_BITS = [("MOSAIC_NO_DATA", "FNODATA", "no exposure contributed (mask)"),
                ("MOSAIC_FEW_EXPOSURES", "FFEWEXP", "under half the exposures contributed"),
                ("MOSAIC_SATURATED", "FSATUR", "saturated in some exposure (mask for flux)"),
                ("MOSAIC_CR_ONLY", "FCRONLY", "only cosmic-ray-repaired pixels contributed")]


def flag_header_cards(kind: str = "mosaic") -> list[tuple[str, int, str]]:
    """(FITS key, bit value, comment) of every flag bit of a ``mosaic`` or ``exposure`` flag
    image, as written in the header of its flag extension (``FNODATA``, ``FHOT``, ...)."""
    require(kind in ("mosaic", "exposure"), "kind", kind, "must be mosaic or exposure")
    bits = _MOSAIC_BITS if kind == "mosaic" else _EXPOSURE_BITS
    return [(key, globals()[name], comment) for name, key, comment in bits]


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
        Mosaic flags ``MOSAIC_*``.
    artefact : ndarray (e-/s per mosaic pixel) or None
        The exposures' ``artefact`` images (signal no noise model describes) combined with the
        drizzle weights of the nearest exposure pixels; None when no exposure has one.
    """

    sci: np.ndarray
    wht: np.ndarray
    exp: np.ndarray
    dq: np.ndarray
    artefact: np.ndarray | None = None
    stripes: np.ndarray | None = None  #: the exposures' ``stripes`` combined like ``artefact``
    persistence: np.ndarray | None = None  #: the exposures' ``persistence``, likewise


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
    flags = _FlagCounter(mosaic_grid)
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
        flags.add(e, g, w, ratio * ratio)
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
    dq = flags.flags(covered)
    sci[~covered] = 0.0
    return Mosaic(sci=sci, wht=wht, exp=exp, dq=dq, artefact=flags.artefact(),
                  stripes=flags.artefact("stripes"), persistence=flags.artefact("persist"))


class _FlagCounter:
    """Per mosaic pixel: how many exposures cover it, contribute, are saturated or had a
    repaired cosmic ray there, judged at the exposure pixel nearest to the mosaic pixel's
    centre; and the weighted mean of the exposures' artefact images at those pixels."""

    #: (accumulator attribute, Exposure attribute) of the artefact images averaged
    ARTEFACTS = (("art", "artefact"), ("stripes", "stripes"), ("persist", "persistence"))

    def __init__(self, grid: Grid):
        self.grid = grid
        shape = grid.shape
        self.n_cover = np.zeros(shape, np.int16)
        self.n_good = np.zeros(shape, np.int16)
        self.n_sat = np.zeros(shape, np.int16)
        self.n_cr = np.zeros(shape, np.int16)
        self.art = None
        self.stripes = None
        self.persist = None
        self.wsum = np.zeros(shape, np.float32)

    def add(self, e, g: Grid, w: np.ndarray, iscale: float) -> None:
        """Count exposure ``e`` (grid ``g``, float32 weights ``w``) in one pass over the
        mosaic pixels (:func:`simfield.pixelops.nearest_counts`)."""
        from ..pixelops import nearest_counts, nearest_weighted_add

        a, b = _affine(self.grid, g)
        src, wk = nearest_counts(a, b, e.dq, w, DQ_SATURATED, DQ_COSMIC_RAY, self.n_cover,
                                 self.n_good, self.n_sat, self.n_cr, self.wsum)
        for name, attr in self.ARTEFACTS:
            art = getattr(e, attr, None)
            if art is not None:
                if getattr(self, name) is None:
                    setattr(self, name, np.zeros(self.grid.shape, np.float32))
                nearest_weighted_add(src, wk, art, iscale, getattr(self, name))

    def flags(self, covered: np.ndarray) -> np.ndarray:
        dq = np.zeros(self.grid.shape, np.int32)
        dq[~covered] |= MOSAIC_NO_DATA
        dq[covered & (2 * self.n_good < self.n_cover)] |= MOSAIC_FEW_EXPOSURES
        dq[self.n_sat > 0] |= MOSAIC_SATURATED
        dq[covered & (self.n_good > 0) & (self.n_cr == self.n_good)] |= MOSAIC_CR_ONLY
        return dq

    def artefact(self, name: str = "art") -> np.ndarray | None:
        acc = getattr(self, name)
        if acc is None:
            return None
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.wsum > 0, acc / self.wsum, 0.0).astype(np.float32)


def mosaic_hdus(mosaic: Mosaic, grid: Grid, band: str = "", zeropoint: float | None = None,
                header: dict | None = None) -> list:
    """FITS HDUs of a mosaic: an empty primary and IMAGE, INVVAR, EXPOSURE, FLAGS image
    extensions.

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
    units = {"IMAGE": ("electron/s", mosaic.sci.astype(np.float32)),
             "INVVAR": ("s2/electron2", mosaic.wht.astype(np.float32)),
             "EXPOSURE": ("s", mosaic.exp.astype(np.float32)),
             "FLAGS": ("", mosaic.dq.astype(np.int32))}
    hdus = [prim]
    for name, (unit, data) in units.items():
        h = fits.ImageHDU(data=data, header=wcs_header.copy(), name=name)
        if unit:
            h.header["BUNIT"] = unit
        if name == "FLAGS":
            for key, bit, comment in flag_header_cards("mosaic"):
                h.header[key] = (bit, comment)
        h.header["EXPTIME"] = (float(mosaic.exp.max()) if mosaic.exp.size else 0.0,
                               "[s] maximum summed exposure time")
        hdus.append(h)
    return hdus
