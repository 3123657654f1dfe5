"""Baseline source detector run on a mosaic (photutils underneath).

Steps: a background map (sigma-clipped medians on a mesh, median-filtered, interpolated), a
matched filter (a circular Gaussian of the PSF FWHM), a segmentation of the filtered image above
``threshold_sigma`` times the per-pixel noise of the unfiltered image (the usual practice of
photutils and of similar detectors), deblending by multi-thresholding, then photometry in a
circular aperture, in the isophotal footprint and in a Kron aperture.

Units: images in e-/s, the inverse-variance weight in (e-/s)^-2, fluxes in e-/s (and nJy),
magnitudes AB, pixel positions 0-based (pixel centre at integers, see :mod:`simfield.grid`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from astropy.convolution import convolve_fft
from astropy.table import Table
from astropy.wcs import WCS

from .bands import AB_NJY_ZERO
from .config import DetectionConfig
from .errors import ConfigError, check_range, require

__all__ = ["Detections", "detect_sources", "run_detection"]

# 2.5 / ln(10): magnitude error per unit fractional flux error
_MAG_PER_FRAC = 2.5 / np.log(10.0)


@dataclass(frozen=True)
class Detections:
    """Result of :func:`detect_sources`.

    Attributes
    ----------
    catalog : astropy.table.Table
        One row per detection (columns in :func:`detect_sources`).
    segmentation : ndarray of int, shape (ny, nx)
        Detection footprint labels; 0 is background, label ``i`` is row with ``id == i``.
    background : ndarray (e-/s)
        Background map that was subtracted.
    """

    catalog: Table
    segmentation: np.ndarray
    background: np.ndarray


def _columns_empty(meta) -> Table:
    t = Table(names=("id", "x", "y", "ra", "dec", "flux", "flux_err", "flux_njy", "mag",
                     "mag_err", "flux_aper", "flux_aper_err", "mag_aper", "flux_iso",
                     "flux_iso_err", "area", "snr", "a_arcsec", "b_arcsec", "theta_deg",
                     "kron_radius"),
              dtype=[int] + [float] * 20)
    t.meta.update(meta)
    return t


def detect_sources(sci, wht, wcs: WCS, cfg: DetectionConfig, psf_fwhm_arcsec: float,
                   zeropoint: float, pixel_scale_arcsec: float, exptime: float | None = None,
                   mask=None) -> Detections:
    """Detect and measure sources on one mosaic.

    Parameters
    ----------
    sci : ndarray (e-/s), shape (ny, nx)
        Science image.
    wht : ndarray ((e-/s)^-2), shape (ny, nx)
        Inverse-variance weight; pixels with ``wht <= 0`` are treated as not covered.
    wcs : astropy.wcs.WCS
        Celestial WCS of the mosaic.
    cfg : DetectionConfig
        Detection settings.
    psf_fwhm_arcsec : float (arcsec)
        PSF FWHM, used for the matched filter when ``cfg.kernel_fwhm_arcsec == 0``.
    zeropoint : float (AB mag)
        Magnitude of a 1 e-/s source.
    pixel_scale_arcsec : float (arcsec/pixel)
        Mosaic pixel side.
    exptime : float (s), optional
        Effective exposure time; when given, the Poisson noise of the sources (gain = exptime
        electrons per e-/s) is added to the flux errors.
    mask : ndarray of bool, optional
        Pixels to ignore (e.g. data-quality flags set).

    Returns
    -------
    Detections
        Catalogue (columns ``id``; ``x``, ``y`` 0-based pixels; ``ra``, ``dec`` deg; ``flux``,
        ``flux_err`` Kron flux in e-/s; ``flux_njy`` nJy; ``mag``, ``mag_err`` AB;
        ``flux_aper``, ``flux_aper_err`` in the circular aperture (e-/s); ``mag_aper``;
        ``flux_iso``, ``flux_iso_err`` isophotal (e-/s); ``area`` isophotal area (pixels);
        ``snr`` = flux / flux_err; ``a_arcsec``, ``b_arcsec``, ``theta_deg`` moments ellipse;
        ``kron_radius`` in first-moment radii), the segmentation image and the background.
    """
    from photutils.background import Background2D, MedianBackground
    from photutils.segmentation import (SourceCatalog, deblend_sources, make_2dgaussian_kernel)
    from photutils.segmentation import detect_sources as _segment
    from photutils.utils import NoDetectionsWarning, calc_total_error

    sci = np.asarray(sci, dtype=float)
    wht = np.asarray(wht, dtype=float)
    if sci.shape != wht.shape or sci.ndim != 2:
        raise ConfigError("wht", wht.shape, f"must be 2-D with the shape of sci {sci.shape}")
    check_range("psf_fwhm_arcsec", psf_fwhm_arcsec, 0, 60, lo_open=True)
    check_range("pixel_scale_arcsec", pixel_scale_arcsec, 0, 60, lo_open=True)
    require(np.isfinite(zeropoint), "zeropoint", zeropoint, "must be finite")

    bad = ~np.isfinite(sci) | ~np.isfinite(wht) | (wht <= 0)
    if mask is not None:
        bad |= np.asarray(mask, dtype=bool)
    meta = {"PIXORIG": "0-based pixel coordinates (centre of first pixel = 0)",
            "ZP_AB": float(zeropoint), "FLUXUNIT": "e-/s"}
    ny, nx = sci.shape
    if bad.all():
        return Detections(_columns_empty(meta), np.zeros(sci.shape, int), np.zeros(sci.shape))
    data = np.where(bad, 0.0, sci)
    rms = np.where(bad, np.inf, 1.0 / np.sqrt(np.where(wht > 0, wht, 1.0)))

    # --- background: mesh of ~background_box_arcsec, at most a quarter of the image
    box = int(round(cfg.background_box_arcsec / pixel_scale_arcsec))
    box = max(8, min(box, max(ny, nx) // 4 if max(ny, nx) >= 32 else max(ny, nx)))
    bkg = Background2D(data, box, coverage_mask=bad, fill_value=0.0,
                       filter_size=(int(cfg.background_filter),) * 2,
                       bkg_estimator=MedianBackground(), exclude_percentile=50.0)
    back = np.where(bad, 0.0, bkg.background)
    sub = np.where(bad, 0.0, data - back)

    # --- matched filter: unit-sum circular Gaussian of the PSF FWHM, size ~ 4 FWHM (odd)
    fwhm_pix = (cfg.kernel_fwhm_arcsec or psf_fwhm_arcsec) / pixel_scale_arcsec
    size = int(2 * np.ceil(2.0 * fwhm_pix) + 1)
    kernel = make_2dgaussian_kernel(fwhm_pix, size=max(size, 3))
    conv = convolve_fft(sub, kernel, mask=bad, normalize_kernel=True, preserve_nan=False,
                        boundary="fill", fill_value=0.0, nan_treatment="fill")
    conv[bad] = 0.0

    threshold = cfg.threshold_sigma * np.where(bad, np.inf, rms)
    with warnings.catch_warnings():  # "no sources found" is an answer here, not a warning
        warnings.simplefilter("ignore", NoDetectionsWarning)
        segm = _segment(conv, threshold, n_pixels=int(cfg.npixels), mask=bad)
    if segm is None:
        return Detections(_columns_empty(meta), np.zeros(sci.shape, int), back)
    if cfg.deblend and segm.n_labels > 0:
        segm = deblend_sources(conv, segm, n_pixels=int(cfg.npixels), n_levels=int(cfg.nlevels),
                               contrast=float(cfg.contrast), progress_bar=False)

    if exptime is not None and exptime > 0:
        error = calc_total_error(sub, np.where(bad, 0.0, rms), float(exptime))
    else:
        error = np.where(bad, 0.0, rms)
    cat = SourceCatalog(sub, segm, convolved_data=conv, error=error, mask=bad, wcs=wcs,
                        kron_params=(float(cfg.kron_factor), float(cfg.kron_min_radius), 0.0))
    r_ap = cfg.aperture_radius_arcsec / pixel_scale_arcsec
    f_ap, e_ap = cat.circular_photometry(r_ap)
    f_kr, e_kr = cat.kron_flux, cat.kron_flux_err
    f_iso, e_iso = cat.segment_flux, cat.segment_flux_err
    x, y = np.asarray(cat.x_centroid, float), np.asarray(cat.y_centroid, float)
    ra, dec = wcs.all_pix2world(x, y, 0)

    def _mag(f):
        f = np.asarray(f, float)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(f > 0, zeropoint - 2.5 * np.log10(np.where(f > 0, f, 1.0)), np.nan)

    flux = np.asarray(f_kr, float)
    flux_err = np.asarray(e_kr, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = flux / flux_err
        mag_err = np.where(flux > 0, _MAG_PER_FRAC * flux_err / np.abs(flux), np.nan)
    t = Table()
    t["id"] = np.asarray(cat.labels, int)
    t["x"], t["y"] = x, y
    t["ra"], t["dec"] = np.asarray(ra, float) % 360.0, np.asarray(dec, float)
    t["flux"], t["flux_err"] = flux, flux_err
    # e-/s -> nJy: 1 e-/s is ZP AB, i.e. 10^(-0.4 (ZP - 31.4)) nJy
    t["flux_njy"] = flux * 10.0 ** (-0.4 * (zeropoint - AB_NJY_ZERO))
    t["mag"], t["mag_err"] = _mag(flux), mag_err
    t["flux_aper"], t["flux_aper_err"] = np.asarray(f_ap, float), np.asarray(e_ap, float)
    t["mag_aper"] = _mag(f_ap)
    t["flux_iso"], t["flux_iso_err"] = np.asarray(f_iso, float), np.asarray(e_iso, float)
    t["area"] = np.asarray(cat.area.value, float)
    t["snr"] = snr
    t["a_arcsec"] = np.asarray(cat.semimajor_axis.value, float) * pixel_scale_arcsec
    t["b_arcsec"] = np.asarray(cat.semiminor_axis.value, float) * pixel_scale_arcsec
    t["theta_deg"] = np.asarray(cat.orientation.value, float)
    t["kron_radius"] = np.asarray(cat.kron_radius.value, float)
    # e-/s columns carry no astropy unit (FITS has no "electron"); FLUXUNIT in meta says it
    units = {"x": "pix", "y": "pix", "ra": "deg", "dec": "deg",
             "flux_njy": "nJy", "mag": "mag", "mag_err": "mag", "mag_aper": "mag",
             "area": "pix2",
             "a_arcsec": "arcsec", "b_arcsec": "arcsec", "theta_deg": "deg"}
    for k, u in units.items():
        t[k].unit = u
    meta.update({"APER_AS": float(cfg.aperture_radius_arcsec), "KERNFWHM": float(fwhm_pix),
                 "THRESH": float(cfg.threshold_sigma)})
    t.meta.update(meta)
    return Detections(t, np.asarray(segm.data, dtype=np.int32), back)


def run_detection(run_dir, sc, bands, prov) -> dict:
    """Run :func:`detect_sources` on each mosaic of a run directory; write ``detections_<band>.fits``.

    Parameters
    ----------
    run_dir : path
        Run directory holding ``mosaic_<band>.fits`` and ``psf_<band>.fits``.
    sc : simfield.config.Scenario
        The scenario (``sc.detection`` is used; bands from ``sc.detection_bands``).
    bands : list of simfield.bands.Band
        The scenario's bands.
    prov : simfield.io.Provenance
        Provenance written into every file.

    Returns
    -------
    dict
        Number of detections per band.
    """
    from pathlib import Path

    from astropy.io import fits

    from .io import write_fits

    run_dir = Path(run_dir)
    cfg = sc.detection
    wanted = sc.detection_bands
    counts = {}
    for name in wanted:
        with fits.open(run_dir / f"mosaic_{name}.fits") as hl:
            sci = hl["SCI"].data.astype(float)
            wht = hl["WHT"].data.astype(float)
            hdr = hl["SCI"].header
            dq = hl["DQ"].data if "DQ" in hl else None
            # cosmic-ray and saturation bits mark repaired pixels (their slopes were refitted):
            # only pixels that no exposure covers are left out of detection
            no_cov = int(hl["DQ"].header.get("DQNOCOVE", 16)) if dq is not None else 0
        wcs = WCS(hdr)
        scale = float(np.sqrt(abs(np.linalg.det(wcs.pixel_scale_matrix))) * 3600.0)
        with fits.open(run_dir / f"psf_{name}.fits") as hl:
            fwhm = float(hl["PSF_DET" if "PSF_DET" in hl else 1].header["FWHM"])
        det = detect_sources(sci, wht, wcs, cfg, fwhm, float(hdr["ZP_AB"]), scale,
                             exptime=float(hdr.get("EXPTIME", 0)) or None,
                             mask=None if dq is None else (dq & no_cov) != 0)
        cat = det.catalog
        cat.meta.update({"BAND": name})
        seg = fits.ImageHDU(det.segmentation, header=wcs.to_header(), name="SEGM")
        write_fits(run_dir / f"detections_{name}.fits",
                   [fits.BinTableHDU(cat, name="DETECTIONS"), seg], prov,
                   [("BAND", name, "simfield band name")])
        counts[name] = int(len(cat))
    return counts
