"""Injection of model sources into a real image, then detection and scoring as for a mock.

``inject_into_image`` draws sources from the population model (usually the uniform injection
mode) onto a user's own FITS image with a celestial WCS, convolved with the user's PSF (a FITS
image) or with the model PSF of the band, and lays the result out like a simfield run
directory (``mosaic_<band>.fits`` holding the injected image, ``truth.fits`` the injected
sources, ``psf_<band>.fits``, ``truth_image_<band>.fits`` the injected light alone), so the
scorer reads it exactly as it reads a mock.

Detections already present in the original image (real objects, or noise peaks of the real
image) are removed from the injected image's catalogue before scoring: a detection within the
match radius of an original detection whose flux the injection left unchanged (within 3 sigma)
does not count, so completeness is the recovered fraction of injected sources and the false
detections are those the injection itself caused (shreds, blends).

Units: the image is in its own units; ``zeropoint`` is the AB magnitude of one image unit
(header ``ZP_AB`` by default). Positions in degrees (sky) and 0-based pixels.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.stats import sigma_clipped_stats
from astropy.table import Table
from astropy.wcs import WCS

from .columns import POINT_KINDS
from .config import Scenario, hash_and_yaml
from .errors import CatalogError
from .grid import Grid
from .io import COMPLETE_MARKER, Provenance, write_fits, write_json, write_table, write_text
from .random import stream
from .scene import accumulate, convolve_tiled, dominant_source, draw_stamps

__all__ = ["read_image", "read_psf", "inject_into_image"]


def read_image(path, hdu=None, zeropoint: float | None = None, weight_hdu=None):
    """Image, inverse-variance weight, WCS and zero point of a user's FITS file.

    Parameters
    ----------
    path : path
        FITS file.
    hdu : int or str, optional
        The image HDU (default: ``IMAGE`` or ``SCI`` if present, else the first HDU with 2-D
        data).
    zeropoint : float (AB mag), optional
        AB magnitude of one image unit; default the header's ``ZP_AB``.
    weight_hdu : int or str, optional
        Inverse-variance HDU; default ``INVVAR`` (or ``WHT``) if present, else a constant
        weight from the sigma-clipped standard deviation of the image.

    Returns
    -------
    sci, wht : ndarray (image units, image units^-2)
    wcs : astropy.wcs.WCS
    zeropoint : float (AB mag)
    header : astropy.io.fits.Header
    noise_table : tuple or None
        The weight header's aperture noise table (:mod:`simfield.noisecards`), if it has one:
        detection scales its flux errors by it.
    """
    path = Path(path)
    if not path.is_file():
        raise CatalogError(f"image {str(path)!r} does not exist")
    with fits.open(path) as hl:
        if hdu is None:
            # simfield's own layout first, then the common SCI / WHT convention
            hdu = next((n for n in ("IMAGE", "SCI") if n in hl), None)
            hdu = hdu if hdu is not None else next(
                (i for i, h in enumerate(hl) if h.data is not None and h.data.ndim == 2), None)
        if hdu is None or hdu not in hl and not isinstance(hdu, int):
            raise CatalogError(f"{path.name}: no 2-D image HDU found (hdu={hdu!r})")
        h = hl[hdu]
        if h.data is None or h.data.ndim != 2:
            raise CatalogError(f"{path.name}[{hdu}]: needs 2-D image data")
        sci = np.asarray(h.data, float)
        header = h.header.copy()
        wcs = WCS(header).celestial
        if not wcs.has_celestial:
            raise CatalogError(f"{path.name}[{hdu}]: the header has no celestial WCS")
        zp = zeropoint if zeropoint is not None else header.get("ZP_AB")
        if zp is None or not np.isfinite(zp):
            raise CatalogError(f"{path.name}[{hdu}]: no ZP_AB keyword; give the AB magnitude "
                               f"of one image unit with --zeropoint")
        if weight_hdu is None:
            weight_hdu = next((n for n in ("INVVAR", "WHT") if n in hl), None)
        noise = None
        if weight_hdu is not None:
            from .noisecards import read_noise_factors

            wht = np.asarray(hl[weight_hdu].data, float)
            noise = read_noise_factors(hl[weight_hdu].header)
            if wht.shape != sci.shape:
                raise CatalogError(f"{path.name}[{weight_hdu}]: shape {wht.shape} differs "
                                   f"from the image {sci.shape}")
        else:
            good = np.isfinite(sci)
            _, _, std = sigma_clipped_stats(sci[good], sigma=3.0)
            if not np.isfinite(std) or std <= 0:
                raise CatalogError(f"{path.name}[{hdu}]: the image's pixels have no scatter "
                                   f"(sigma-clipped std {std:g}) to weigh them by; give an "
                                   f"inverse-variance HDU with --weight-hdu")
            wht = np.where(good, 1.0 / std**2, 0.0)
    return sci, wht, wcs, float(zp), header, noise


def read_psf(path, scale_arcsec: float) -> np.ndarray:
    """A user's PSF image (first 2-D HDU), resampled to ``scale_arcsec`` if its header's
    ``PIXSCALE`` (arcsec) differs, trimmed to odd size, normalised to unit sum."""
    from scipy import ndimage

    with fits.open(path) as hl:
        h = next((h for h in hl if h.data is not None and h.data.ndim == 2), None)
        if h is None:
            raise CatalogError(f"PSF file {str(path)!r} has no 2-D image")
        psf = np.asarray(h.data, float)
        ps = float(h.header.get("PIXSCALE", scale_arcsec))
    if not np.all(np.isfinite(psf)) or psf.sum() <= 0:
        raise CatalogError(f"PSF file {str(path)!r}: values must be finite with a positive sum")
    if abs(ps / scale_arcsec - 1) > 1e-3:
        psf = ndimage.zoom(psf, ps / scale_arcsec, order=3)
    ny, nx = psf.shape
    psf = psf[: ny - (1 - ny % 2), : nx - (1 - nx % 2)]
    psf = np.clip(psf, 0, None)
    return psf / psf.sum()


def _pixel_jacobian(wcs: WCS) -> np.ndarray:
    """d(xi, eta)/d(x, y) in arcsec per pixel (xi east, eta north) at the reference pixel."""
    return wcs.pixel_scale_matrix * 3600.0


def inject_into_image(image_path, sc: Scenario, band: str, out_dir, psf_path=None, hdu=None,
                      zeropoint: float | None = None, weight_hdu=None) -> dict:
    """Inject the scenario's population into a real image, detect, and score.

    Parameters
    ----------
    image_path : path
        The user's FITS image (with a celestial WCS).
    sc : Scenario
        Population (``population``, typically ``mode=uniform``), detection and score settings;
        the telescope's band ``band`` gives the model magnitudes (and the PSF when no
        ``psf_path`` is given).
    band : str
        Band name of the scenario that the image is taken in.
    out_dir : path
        Output directory, laid out like a run directory.
    psf_path : path, optional
        PSF image (FITS), taken as an effective PSF (optics and pixel response); default: the
        model PSF of ``band`` sampled at the image's pixel centres (the stamps of the sources
        are integrated over the pixels, so the pixel box is applied once).
    hdu, zeropoint, weight_hdu :
        See :func:`read_image`.

    Returns
    -------
    dict
        The score summary of ``band`` (also in ``out_dir/score/<band>/summary.json``) with the
        injection's counts; ``out_dir/summary.json`` holds both, and ``out_dir/scenario.yaml``
        the scenario, so ``simfield-score out_dir`` finds the band and score settings.
    """
    from .detect import detect_sources
    from .optics.psf import band_psf, measure_fwhm
    from .bands import make_bands
    from .population.lightcone import make_population
    from .population.morphology import make_profile
    from .score.match import match_sky
    from .score.run import score_run

    bands = make_bands(sc)
    names = [b.name for b in bands]
    if band not in names:
        raise CatalogError(f"band {band!r} is not a band of the scenario ({', '.join(names)})")
    b = bands[names.index(band)]
    sci, wht, wcs, zp, header, noise = read_image(image_path, hdu, zeropoint, weight_hdu)
    said = header.get("BAND")
    if said is None:  # simfield's mosaics carry it in the primary header
        said = fits.getheader(image_path, 0).get("BAND")
    if said is not None and str(said).strip() != band:
        raise CatalogError(f"band {band!r} asked for, but {Path(image_path).name}'s BAND "
                           f"card says {str(said).strip()!r}: inject in the image's own band "
                           f"(--band {str(said).strip()})")
    jac = _pixel_jacobian(wcs)
    scale = float(np.sqrt(abs(np.linalg.det(jac))))
    psf = (read_psf(psf_path, scale) if psf_path is not None else
           band_psf(sc.telescope, b, scale, sc.telescope.psf.core_radius_arcsec,
                    sc.seed, pixel_integrated=False).image)
    fwhm = measure_fwhm(psf, scale)

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / COMPLETE_MARKER).unlink(missing_ok=True)
    prov = Provenance(sc.seed, *hash_and_yaml(sc))

    # the image footprint as tangent-plane offsets about its centre
    ny, nx = sci.shape
    ra0, dec0 = (float(v) for v in wcs.all_pix2world((nx - 1) / 2, (ny - 1) / 2, 0))
    tan = Grid(nx, ny, scale, ra0, dec0)  # only for exact gnomonic offsets <-> sky
    cx, cy = wcs.all_pix2world([-0.5, nx - 0.5, nx - 0.5, -0.5], [-0.5, -0.5, ny - 0.5, ny - 0.5],
                               0)
    xi, eta = tan.sky_to_offsets(cx, cy)
    sources = make_population(sc.population, bands, (float(np.min(xi)), float(np.max(xi))),
                              (float(np.min(eta)), float(np.max(eta))),
                              stream(sc.seed, "inject", "population"))
    sources["id"] = np.arange(1, len(sources) + 1)
    ra, dec = tan.offsets_to_sky(np.asarray(sources["x_arcsec"], float),
                                 np.asarray(sources["y_arcsec"], float))
    x, y = wcs.all_world2pix(ra, dec, 0)
    sources["ra"], sources["dec"], sources["x"], sources["y"] = ra, dec, x, y
    inside = (x > -0.5) & (x < nx - 0.5) & (y > -0.5) & (y < ny - 0.5) & (wht[
        np.clip(np.rint(y).astype(int), 0, ny - 1), np.clip(np.rint(x).astype(int), 0, nx - 1)
    ] > 0)
    sources = sources[inside]
    sources["id"] = np.arange(1, len(sources) + 1)

    # draw in image pixels: profile (xi, eta) -> pixel frame, J = scale * (d(xi,eta)/d(x,y))^-1
    frame = (scale * np.linalg.inv(jac)).ravel()
    kinds = np.asarray(sources["kind"]).astype(str)
    point = np.isin(kinds, POINT_KINDS)
    stamps = draw_stamps(
        ((i, None if point[i] else make_profile(row, sc.seed, band).transform(*frame),
          float(row["x"]), float(row["y"]), np.nan_to_num(float(row["r_half"])) / scale)
         for i, row in enumerate(sources)), scale)
    rate = np.nan_to_num(10 ** (-0.4 * (np.asarray(sources[f"mag_{band}"], float) - zp)))
    model = convolve_tiled(accumulate(stamps, rate, sci.shape, dtype=np.float64), psf)
    np.maximum(model, 0.0, out=model)
    injected = np.where(wht > 0, sci + model, sci)

    # files in the run-directory layout the scorer reads
    wcs_hdr = wcs.to_header()
    cards = [("BAND", band, "simfield band name"), ("ZP_AB", zp, "[mag] AB mag of 1 unit"),
             ("EXPTIME", float(header.get("EXPTIME", 0.0)), "[s] from the input image"),
             ("INJFROM", Path(image_path).name, "image the sources were injected into")]

    def img(data, name, unit=""):
        h = fits.ImageHDU(np.asarray(data, np.float32), header=wcs_hdr, name=name)
        h.header["BUNIT"] = unit or str(header.get("BUNIT", ""))
        for k, v, c in cards:
            h.header[k] = (v, c)
        return h

    weight = img(wht, "INVVAR", "")
    if noise is not None:  # the input's aperture noise table still describes the image
        from .noisecards import noise_cards

        for k, v, c in noise_cards(*noise):
            weight.header[k] = (v, c)
    write_fits(out / f"mosaic_{band}.fits", [img(injected, "IMAGE"), weight], prov, cards)
    # segmentation of the injected light alone: above 1 sigma of the image's noise
    _, _, std = sigma_clipped_stats(sci[wht > 0], sigma=3.0)
    seg = dominant_source(stamps, rate, np.asarray(sources["id"]), sci.shape, psf, std)
    write_fits(out / f"truth_image_{band}.fits", [img(model, "IMAGE"), img(seg, "SEGMAP", "")],
               prov, cards)
    ph = fits.ImageHDU(psf.astype(np.float32), name="PSF_DET")
    ph.header["PIXSCALE"] = (scale, "[arcsec] PSF pixel")
    ph.header["FWHM"] = (fwhm, "[arcsec] full width at half maximum")
    write_fits(out / f"psf_{band}.fits", [ph], prov)
    src = sources.copy()
    src.meta = {}
    for c in src.colnames:
        if src[c].dtype.kind == "U":
            src[c] = src[c].astype("S")
    src["magnification"] = np.ones(len(src))
    src["n_images"] = np.ones(len(src), np.int32)
    imgs = Table({"image_id": src["id"], "source_id": src["id"], "ra": src["ra"],
                  "dec": src["dec"], "x": src["x"], "y": src["y"],
                  "magnification": np.ones(len(src)), f"mag_{band}": src[f"mag_{band}"]})
    write_fits(out / "truth.fits", [fits.BinTableHDU(src, name="SOURCES"),
                                    fits.BinTableHDU(imgs, name="IMAGES")], prov)

    # detect on the original and on the injected image; keep only new detections
    exptime = float(header.get("EXPTIME", 0.0)) or None
    before = detect_sources(sci, wht, wcs, sc.detection, fwhm, zp, scale, exptime,
                            noise_table=noise).catalog
    after = detect_sources(injected, wht, wcs, sc.detection, fwhm, zp, scale, exptime,
                           noise_table=noise).catalog
    r = sc.score.match_radius_arcsec
    if len(before) and len(after):
        m = match_sky(np.asarray(after["ra"]), np.asarray(after["dec"]),
                      np.asarray(before["ra"]), np.asarray(before["dec"]), r)
        j = np.asarray(m.truth_to_det)
        old = j >= 0
        # a match counts as the same object only if the injection did not change its flux
        fa, ea = np.asarray(after["flux"], float), np.asarray(after["flux_err"], float)
        fb = np.asarray(before["flux"], float)[np.where(old, j, 0)]
        eb = np.asarray(before["flux_err"], float)[np.where(old, j, 0)]
        old &= np.abs(fa - fb) < 3.0 * np.hypot(ea, eb)
    else:
        old = np.zeros(len(after), bool)
    new = after[~old]
    new.meta = {"BAND": band, "NOTE": "detections of the injected image not present before"}
    write_fits(out / f"detections_{band}.fits", [fits.BinTableHDU(new, name="DETECTIONS")],
               prov)
    # the band as a run's bands.ecsv describes it (the report orders bands by pivot_nm)
    bt = Table({"name": [band], "pivot_nm": [b.pivot_nm], "width_nm": [b.width_nm],
                "zeropoint": [zp]})
    bt["pivot_nm"].unit = bt["width_nm"].unit = "nm"
    bt["zeropoint"].unit = "mag"
    bt.meta["description"] = ("Band of the injection. zeropoint: AB magnitude of one unit of "
                              "the input image.")
    write_table(out / "bands.ecsv", bt, prov)
    write_text(out / "scenario.yaml", prov.config_yaml)  # = to_yaml(sc)
    summary = score_run(out, None, band, sc.score, out / "score" / band, prov=prov)
    counts = {"n_injected": int(len(src)), "n_detections_original": int(len(before)),
              "n_detections_injected": int(len(after)), "n_new_detections": int(len(new))}
    summary.update(counts)
    # the folder's own summary, laid out like a run's (simfield-score reads its band from it)
    write_json(out / "summary.json", {"injected_into": Path(image_path).name, **counts,
                                      "detections": {band: int(len(new))},
                                      "score": {band: {k: v for k, v in summary.items()
                                                       if k != "completeness_fit"}}}, prov)
    write_text(out / COMPLETE_MARKER, f"simfield injection seed {sc.seed}\n")
    return summary
