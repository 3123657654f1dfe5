"""Point-source depths: predicted from the noise model, measured from empty-sky apertures."""

from __future__ import annotations

import functools
import math

import numpy as np

from ..config import DetectorConfig, frame_read_noise_e
from ..errors import check_range, require
from ..grid import Grid
from .drizzle import Mosaic


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
    sr = frame_read_noise_e(det)
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


@functools.lru_cache(maxsize=64)
def disk_weights(radius_pix: float, dx: float = 0.0, dy: float = 0.0) -> np.ndarray:
    """Exact overlap (photutils, method ``exact``) of each pixel with a circle of
    ``radius_pix`` pixels centred ``(dx, dy)`` pixels (0 <= dx, dy < 1) from the centre of the
    middle pixel: a (2h+1)^2 image, h = ceil(radius_pix + max(dx, dy))."""
    from photutils.aperture import CircularAperture

    h = int(math.ceil(radius_pix + max(dx, dy)))
    w = CircularAperture((h + dx, h + dy), radius_pix).to_mask(method="exact").to_image(
        (2 * h + 1,) * 2)
    w.setflags(write=False)
    return w


def empty_apertures(images: dict, segm, wht, radii_pix, rng: np.random.Generator,
                    n_apertures: int, grow: int = 3) -> list[dict]:
    """Sums of circular apertures dropped at random over a whole mosaic, away from sources.

    The candidate centres are pixel centres drawn over the whole mosaic at once (uniform,
    ``radius + 1`` from the edges; one set per radius), so the result does not depend on how
    the mosaic was made or cut; every image is read only at the apertures' own pixels, so
    memory maps of any size serve.

    Parameters
    ----------
    images : dict of name -> 2-D array (e-/s per pixel, or (e-/s)^2 for variances)
        The images to sum in every kept aperture (e.g. ``{"sci": ..., "var": ...}``).
    segm : 2-D int array
        Truth segmentation; an aperture is dropped if any pixel within ``grow`` pixels
        (city-block) of a source pixel has its centre within ``radius + 0.5``.
    wht : 2-D array ((e-/s)^-2)
        Apertures reaching a pixel with ``wht <= 0`` are dropped likewise.
    radii_pix : sequence of float (pixels)
    rng : numpy.random.Generator
    n_apertures : int
        Candidate apertures drawn per radius.

    Returns
    -------
    list of dict, one per radius: name -> ndarray
        One exact-overlap sum (:func:`disk_weights`) per kept aperture and image, plus the
        centres ``x``, ``y`` (pixels).
    """
    ny, nx = segm.shape
    out = []
    for r in radii_pix:
        lo = int(math.ceil(r)) + 1
        empty = {k: np.zeros(0) for k in list(images) + ["x", "y"]}
        if n_apertures <= 0 or nx - lo <= lo or ny - lo <= lo:
            out.append(empty)
            continue
        xc = rng.integers(lo, nx - lo, n_apertures)
        yc = rng.integers(lo, ny - lo, n_apertures)
        # pixels whose centres lie within r + 0.5 + grow city-block steps: reject any source
        # pixel there (the dilation of the source mask by ``grow``, looked up directly)
        h = int(math.ceil(r + 0.5)) + grow
        dy, dx = np.mgrid[-h:h + 1, -h:h + 1]
        inner = dy ** 2 + dx ** 2 <= (r + 0.5) ** 2
        near = np.zeros_like(inner)
        for oy, ox in zip(*np.nonzero(inner)):
            near |= (np.abs(dy - dy[oy, ox]) + np.abs(dx - dx[oy, ox])) <= grow
        keep = np.ones(n_apertures, bool)
        for oy, ox in zip(dy[near], dx[near]):
            keep &= ~(_take(segm, yc + oy, xc + ox) > 0)
        for oy, ox in zip(dy[inner], dx[inner]):
            keep &= _take(wht, yc + oy, xc + ox) > 0
        xc, yc = xc[keep], yc[keep]
        w = disk_weights(r)
        k = w.shape[0] // 2
        res = {"x": xc.astype(float), "y": yc.astype(float)}
        for name, img in images.items():
            s = np.zeros(xc.size)
            for oy, ox in zip(*np.nonzero(w)):
                s += w[oy, ox] * _take(img, yc + oy - k, xc + ox - k)
            res[name] = s
        out.append(res)
    return out


def _take(img, y: np.ndarray, x: np.ndarray) -> np.ndarray:
    """img[y, x] for index arrays (pixels outside read as 0), memory maps read sparsely."""
    ny, nx = img.shape
    ok = (y >= 0) & (y < ny) & (x >= 0) & (x < nx)
    out = np.zeros(y.shape)
    if ok.any():
        out[ok] = np.asarray(img[y[ok], x[ok]], float)
    return out


def robust_sigma(values) -> float:
    """1.4826 x the median absolute deviation (the Gaussian sigma of a clean sample)."""
    v = np.asarray(values, float)
    return float(1.4826 * np.median(np.abs(v - np.median(v)))) if v.size else float("nan")
