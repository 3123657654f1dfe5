"""One run's forced multi-band photometry: read the written files, measure, write
``photometry.fits``.

Fed only by the files a run writes (``detections_<band>.fits``, ``mosaic_<band>.fits``,
``psf_<band>.fits``); imports no stage.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales

from ..columns import PHOTOMETRY_COLUMNS, describe, table_hdu
from ..errors import CatalogError, ConfigError
from ..io import Provenance, write_fits
from ..noisecards import noise_factor, read_noise_factors
from .encircled import drop_width, effective_ee
from .forced import BLOCK_PIXELS, aperture_sums
from .kernels import matched_noise_ratio, matching_kernel

__all__ = ["PSFInfo", "read_psf", "target_band", "check_match_target", "measure_catalog",
           "measure_run"]


class PSFInfo:
    """A band's PSF including the detector pixel: image (unit sum), pixel (arcsec), FWHM
    (arcsec) and encircled-energy table (radius arcsec, fraction)."""

    def __init__(self, image, pixscale: float, fwhm: float, ee_radius, ee):
        self.image = np.asarray(image, float)
        self.pixscale = float(pixscale)
        self.fwhm = float(fwhm)
        self.ee_radius = np.asarray(ee_radius, float)
        self.ee = np.asarray(ee, float)

    def encircled(self, radius_arcsec: float) -> float:
        """Encircled energy (fraction) inside ``radius_arcsec``, linearly interpolated."""
        return float(np.interp(radius_arcsec, self.ee_radius, self.ee))


def read_psf(path) -> PSFInfo:
    """``PSF_DET`` and ``EE`` of a ``psf_<band>.fits``."""
    with fits.open(path) as hl:
        h = hl["PSF_DET"].header
        ee = Table.read(hl["EE"])
        return PSFInfo(hl["PSF_DET"].data, h["PIXSCALE"], h["FWHM"], ee["radius"], ee["ee"])


def target_band(psfs: dict[str, PSFInfo], match_to: str = "") -> str:
    """``match_to``, or else the band of the broadest PSF (largest FWHM)."""
    return match_to or max(psfs, key=lambda b: psfs[b].fwhm)


def check_match_target(fwhm: dict[str, float], match_to: str) -> None:
    """Refuse (ConfigError on ``photometry.match_to``) a target band whose PSF FWHM (arcsec,
    ``fwhm`` per band) is narrower than another band's: matching to it would deconvolve."""
    broader = [b for b, w in fwhm.items() if w > fwhm[match_to] * 1.001]
    if broader:
        raise ConfigError("photometry.match_to", match_to,
                          f"has a PSF of FWHM {fwhm[match_to]:.4g} arcsec, narrower than that "
                          f"of {', '.join(broader)}: leave it empty (the broadest PSF, "
                          f"{max(fwhm, key=fwhm.get)}) or name the band with the broadest PSF")


def measure_catalog(det: Table, mosaics: dict[str, Path], psfs: dict[str, PSFInfo],
                    radius_arcsec: float, match_to: str = "", drop_arcsec: float = 0.0,
                    block: int = BLOCK_PIXELS) -> Table:
    """Forced photometry of every row of ``det`` in every band.

    Parameters
    ----------
    det : Table
        Detections with ``id``, ``x``, ``y`` (pix, 0-based), ``ra``, ``dec`` (deg).
    mosaics : dict band -> path of ``mosaic_<band>.fits``
    psfs : dict band -> PSFInfo
    radius_arcsec : float (arcsec)
        Aperture radius.
    match_to : str
        Target band of the PSF matching; empty: the broadest PSF.
    drop_arcsec : float (arcsec)
        Width of the drizzle drop (a box; 0 for none), for the aperture corrections
        (:mod:`.encircled`).
    block : int (mosaic pixels)
        Side of the blocks the mosaics are read in (does not change the result).

    Returns
    -------
    Table
        Columns of :data:`simfield.columns.PHOTOMETRY_COLUMNS` (nJy); meta
        ``MATCHTO``, ``APER_AS`` and per band ``PBANDnn`` (name) and ``PNOISnn`` (matched over
        native aperture noise, sqrt(R) of :func:`.kernels.matched_noise_ratio`), nn from 01.
    """
    target = target_band(psfs, match_to)
    tp = psfs[target]
    check_match_target({b: psfs[b].fwhm for b in {target, *mosaics}}, target)
    out = Table({k: np.asarray(det[k]) for k in ("id", "ra", "dec", "x", "y")})
    out.meta.update(MATCHTO=target, APER_AS=float(radius_arcsec))
    for i, (b, path) in enumerate(mosaics.items(), start=1):
        with fits.open(path) as hl:
            hdr = hl["IMAGE"].header
            pix = float(proj_plane_pixel_scales(WCS(hdr))[0] * 3600.0)
            fluxnjy = float(hdr["FLUXNJY"])
            table = read_noise_factors(hl["INVVAR"].header)
            rho = np.asarray(hl["NOISECOR"].data, float) if "NOISECOR" in hl else np.ones((1, 1))
        r_pix = radius_arcsec / pix
        kernel = None if b == target else matching_kernel(psfs[b].image, tp.image,
                                                          psfs[b].pixscale, pix)
        ratio = 1.0 if kernel is None else matched_noise_ratio(rho, kernel, r_pix)
        s = aperture_sums(path, out["x"], out["y"], r_pix, kernel, block)
        err = float(noise_factor(table, r_pix)) * np.sqrt(s.var)
        widths = (drop_arcsec, pix, pix)  # drop, mosaic pixel, aperture on pixels
        ee_b, ee_t = (effective_ee(p, radius_arcsec, widths) for p in (psfs[b], tp))
        out[f"flux_{b}"] = s.matched * fluxnjy / ee_t
        out[f"flux_err_{b}"] = err * np.sqrt(ratio) * fluxnjy / ee_t
        out[f"flux_native_{b}"] = s.native * fluxnjy / ee_b
        out[f"flux_native_err_{b}"] = err * fluxnjy / ee_b
        out[f"flags_{b}"] = s.flags
        out.meta[f"PBAND{i:02d}"] = b
        out.meta[f"PNOIS{i:02d}"] = round(float(np.sqrt(ratio)), 5)
    return describe(out, PHOTOMETRY_COLUMNS)


def measure_run(run_dir, sc, prov: Provenance) -> dict:
    """Measure ``photometry.fits`` in ``run_dir`` from the run's written files.

    Parameters
    ----------
    run_dir : path of the run directory
    sc : simfield.config.Scenario
        Uses ``photometry`` (aperture, target band), the bands and the first detection band.
    prov : Provenance

    Returns
    -------
    dict
        Headline numbers: ``n_rows``, ``detection_band``, ``match_to``,
        ``aperture_radius_arcsec``, ``bands``, per band ``median_snr`` (matched flux / error
        of the detections) and ``noise_ratio`` (matched over native error).
    """
    run_dir = Path(run_dir)
    bands = sc.band_names
    detband = sc.detection_bands[0]
    path = run_dir / f"detections_{detband}.fits"
    if not path.is_file():
        raise CatalogError(f"photometry: {path} not found (detection.enabled must be true)")
    det = Table.read(path, hdu="DETECTIONS")
    psfs = {b: read_psf(run_dir / f"psf_{b}.fits") for b in bands}
    mosaics = {b: run_dir / f"mosaic_{b}.fits" for b in bands}
    cfg = sc.photometry
    drop = drop_width(sc.telescope.pixel_scale_arcsec, sc.survey.pixfrac,
                      sc.survey.drizzle_kernel)
    t = measure_catalog(det, mosaics, psfs, cfg.aperture_radius_arcsec, cfg.match_to, drop)
    t.meta["DETBAND"] = detband
    write_fits(run_dir / "photometry.fits", [table_hdu(t, "PHOTOMETRY")], prov,
               [("DETBAND", detband, "band of the detection catalogue"),
                ("MATCHTO", t.meta["MATCHTO"], "band every PSF is matched to"),
                ("APER_AS", t.meta["APER_AS"], "[arcsec] aperture radius")])

    def median_snr(b):
        snr = np.asarray(t[f"flux_{b}"]) / np.asarray(t[f"flux_err_{b}"])
        snr = snr[np.isfinite(snr)]
        return float(np.median(snr)) if snr.size else None

    return {"n_rows": len(t), "detection_band": detband, "match_to": t.meta["MATCHTO"],
            "aperture_radius_arcsec": float(cfg.aperture_radius_arcsec), "bands": bands,
            "median_snr": {b: median_snr(b) for b in bands},
            "noise_ratio": {t.meta[f"PBAND{i:02d}"]: t.meta[f"PNOIS{i:02d}"]
                            for i in range(1, len(bands) + 1)}}
