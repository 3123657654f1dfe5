"""The files a run writes, assembled for :mod:`simfield.pipeline`: image-file layouts and their
header cards, the truth artefact map, the mosaic noise correlations, the PSF, truth and lens
files. Like :mod:`simfield._readout_hooks` it serves the pipeline only (it may call several
stages; the stages never call it).

Units: images in e-/s per pixel (``BUNIT electron/s``), inverse variances in (e-/s)^-2,
positions in arcsec (tangent-plane offsets) or 0-based pixels, as each docstring says.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from scipy import ndimage

from .bands import Band, ab_to_njy
from .config import Scenario
from .grid import Grid
from .io import write_fits, write_table
from .random import stream

#: A mosaic pixel belongs to a truth source in the SEGMAP map where that source contributes the
#: most light and at least this many times the sky-limited noise of one mosaic pixel.
SEGMENTATION_NSIGMA = 1.0

#: Truth artefact bit: a cosmic-ray deposit too faint to be found left more than
#: ``ARTEFACT_NSIGMA`` times the pixel noise in the mosaic (or a neighbouring pixel).
ARTEFACT_COSMIC = 1
#: Truth artefact bit: saturated in some exposure (the mosaic's saturated flag).
ARTEFACT_SATURATED = 2
ARTEFACT_NSIGMA = 1.0
#: Truth artefact bit: the correlated read noise left by the reference-pixel correction,
#: averaged over ``STRIPE_BOX`` x ``STRIPE_BOX`` mosaic pixels (about a faint source's
#: footprint), exceeds ``ARTEFACT_NSIGMA`` times the noise of such an average without it.
ARTEFACT_STRIPE = 4
STRIPE_BOX = 5
#: Truth artefact bit: persistence from an earlier exposure left more than ``ARTEFACT_NSIGMA``
#: times the pixel noise in the mosaic (or a neighbouring pixel).
ARTEFACT_PERSIST = 8


def artefact_map(mosaic, saturated_bit: int) -> np.ndarray:
    """Truth map of detector artefacts on a mosaic section (int16 bits ``ARTEFACT_*``)."""
    art = np.zeros(mosaic.sci.shape, np.int16)
    if mosaic.artefact is not None:
        sigma = np.where(mosaic.wht > 0, 1.0 / np.sqrt(np.where(mosaic.wht > 0, mosaic.wht, 1)),
                         np.inf)
        cr = np.abs(mosaic.artefact) > ARTEFACT_NSIGMA * sigma
        art[ndimage.binary_dilation(cr)] |= ARTEFACT_COSMIC
    art[(mosaic.dq & saturated_bit) != 0] |= ARTEFACT_SATURATED
    if mosaic.persistence is not None:
        sigma = np.where(mosaic.wht > 0, 1.0 / np.sqrt(np.where(mosaic.wht > 0, mosaic.wht, 1)),
                         np.inf)
        ghost = mosaic.persistence > ARTEFACT_NSIGMA * sigma
        art[ndimage.binary_dilation(ghost)] |= ARTEFACT_PERSIST
    if mosaic.stripes is not None:
        # noise of a box mean without the stripes: pixel sigma / box side (the drizzle's own
        # correlation raises it a little; a threshold, not a statement)
        var = np.where(mosaic.wht > 0, 1.0 / np.where(mosaic.wht > 0, mosaic.wht, 1), 1e30)
        mean_s = ndimage.uniform_filter(mosaic.stripes, STRIPE_BOX, mode="constant")
        sig_box = np.sqrt(np.maximum(ndimage.uniform_filter(var, STRIPE_BOX, mode="constant"),
                                     0.0)) / STRIPE_BOX
        art[np.abs(mean_s) > ARTEFACT_NSIGMA * sig_box] |= ARTEFACT_STRIPE
    return art


#: Drizzled noise covariances of the last few geometries of this process (oldest first).
_COVARIANCES: dict = {}
_COVARIANCES_KEPT = 4


def _covariance_key(sc: Scenario, egrids: list, mgrid: Grid) -> str:
    # the covariances depend on the seed, the detector, the survey and the grids only
    return repr((sc.seed, sc.detector, sc.survey, list(egrids), mgrid))


def noise_covariances(sc: Scenario, egrids: list, mgrid: Grid) -> tuple:
    """The drizzle's noise covariances of the run's geometry (white, IPC-spread and, with
    ``detector.correlated_noise``, correlated-readout noise; :mod:`simfield.survey.noise`),
    kept for the last few geometries of this process: a process that runs the same geometry
    again (a notebook, a test session) reuses them."""
    from .survey import drizzle_noise_covariance

    det, srv = sc.detector, sc.survey
    key = _covariance_key(sc, egrids, mgrid)
    if key in _COVARIANCES:
        return _COVARIANCES[key]
    alpha = det.ipc_alpha if det.ipc else 0.0
    cov_w, cov_c = drizzle_noise_covariance(egrids, mgrid, srv.drizzle_kernel, srv.pixfrac,
                                            alpha, stream(sc.seed, "noise_correlation"))
    cov_r = None
    if det.correlated_noise:
        from ._readout_hooks import readout_covariance

        cov_r = readout_covariance(sc, egrids, mgrid)
    return _remember(key, (cov_w, cov_c, cov_r))


def _remember(key: str, covs: tuple) -> tuple:
    for a in covs:
        if a is not None:
            a.setflags(write=False)
    while len(_COVARIANCES) >= _COVARIANCES_KEPT:
        _COVARIANCES.pop(next(iter(_COVARIANCES)))
    _COVARIANCES[key] = covs
    return covs


def noise_correlations(sc: Scenario, bands: list[Band], egrids: list, mgrid: Grid,
                       covariances: tuple | None = None) -> dict:
    """Each band's mosaic noise correlation (:mod:`simfield.survey.noise`): the drizzle's
    covariance for white and IPC-spread noise (the same geometry for all bands), weighted by
    the detector's split of a sky pixel's variance into those parts. ``covariances``: those
    of :func:`noise_covariances` if already made (e.g. in another process; kept here then)."""
    from .detector import sky_noise_terms
    from .survey import noise_correlation

    tel, srv, det = sc.telescope, sc.survey, sc.detector
    if covariances is None:
        covariances = noise_covariances(sc, egrids, mgrid)
    else:
        key = _covariance_key(sc, egrids, mgrid)
        covariances = _COVARIANCES.get(key) or _remember(key, covariances)
    cov_w, cov_c, cov_r = covariances
    out = {}
    for b in bands:
        sky = b.sky_rate(tel.collecting_area_m2, tel.pixel_scale_arcsec)
        white, charge, _ = sky_noise_terms(det, srv.exposure_time_s, sky)
        out[b.name] = noise_correlation(cov_w, cov_c, white, charge, cov_r)
    return out


def covariances_kept(sc: Scenario, egrids: list, mgrid: Grid) -> bool:
    """Whether this process keeps the noise covariances of this geometry already."""
    return _covariance_key(sc, egrids, mgrid) in _COVARIANCES


def image_files(out: Path, sc: Scenario, bands: list[Band], mgrid: Grid, egrids: list,
                 noise: dict):
    """(path, image specs, primary cards) of every image file the tiles write into; ``noise``
    holds each band's :class:`~simfield.survey.NoiseCorrelation` (the mosaic's noise table)."""
    from . import survey
    from .io import ImageSpec
    from .noisecards import noise_cards

    srv, area = sc.survey, sc.telescope.collecting_area_m2
    t_total = srv.exposure_time_s * srv.n_exposures
    dq_cards = survey.flag_header_cards("mosaic")
    art_cards = [("ARTCOSMI", ARTEFACT_COSMIC, f"cosmic-ray residual > {ARTEFACT_NSIGMA:g} "
                  "sigma (+1 pix)"), ("ARTSATUR", ARTEFACT_SATURATED, "saturated in an exposure"),
                 ("ARTSTRIP", ARTEFACT_STRIPE, f"1/f stripe residual, {STRIPE_BOX}-pix box > "
                  f"{ARTEFACT_NSIGMA:g} sigma"),
                 ("ARTPERSI", ARTEFACT_PERSIST, f"persistence > {ARTEFACT_NSIGMA:g} sigma (+1 pix)")]
    seg_note = ("SEGDEF", "id of the source contributing most light above SEGTHR", "")

    def hdr(grid: Grid, bunit: str, cards=()):
        h = grid.wcs.to_header()
        h["BUNIT"] = bunit
        for k, v, c in cards:
            h[k] = (v, c)
        return h

    items = []
    for b in bands:
        zp = b.zeropoint(area)
        cards = band_cards(b, zp)
        mcards = cards + [("EXPTIME", t_total, "[s] total exposure time at full depth"),
                          ("NEXP", srv.n_exposures, "exposures combined")]
        nc = noise[b.name]
        ncards = noise_cards(nc.radii_pix, nc.factors, nc.factor_inf)
        k = nc.rho.shape[0]
        items.append((out / f"mosaic_{b.name}.fits", [
            ImageSpec("IMAGE", mgrid.shape, np.float32, hdr(mgrid, "electron/s", mcards)),
            ImageSpec("INVVAR", mgrid.shape, np.float32,
                      hdr(mgrid, "s2/electron2", mcards + ncards)),
            ImageSpec("EXPOSURE", mgrid.shape, np.float32, hdr(mgrid, "s")),
            ImageSpec("FLAGS", mgrid.shape, np.int32, hdr(mgrid, "", dq_cards)),
            ImageSpec("NOISECOR", (k, k), np.float32,
                      [("NCDESC", "correlation of pixel noise at lags (centre: 0)", "")]
                      + ncards)], mcards))
        sigma = np.sqrt(b.sky_rate(area, mgrid.scale) * t_total) / t_total
        seg_cards = [("SEGNSIG", SEGMENTATION_NSIGMA, "threshold in sky-limited sigma per pixel"),
                     ("SEGTHR", float(SEGMENTATION_NSIGMA * sigma), "[electron/s] threshold"),
                     seg_note]
        items.append((out / f"truth_image_{b.name}.fits", [
            ImageSpec("IMAGE", mgrid.shape, np.float32, hdr(mgrid, "electron/s", cards)),
            ImageSpec("SEGMAP", mgrid.shape, np.int32, hdr(mgrid, "", seg_cards)),
            ImageSpec("ARTEFACT", mgrid.shape, np.int16, hdr(mgrid, "", art_cards))], cards))
        if srv.write_exposures:
            ecards = cards + [("EXPTIME", srv.exposure_time_s, "[s] exposure time")]
            for k, g in enumerate(egrids):
                items.append((out / "exposures" / f"exp_{b.name}_{k:02d}.fits", [
                    ImageSpec("IMAGE", g.shape, np.float32, hdr(g, "electron/s", ecards)),
                    ImageSpec("VARIANCE", g.shape, np.float32, hdr(g, "electron2/s2")),
                    ImageSpec("FLAGS", g.shape, np.int32,
                              hdr(g, "", survey.flag_header_cards("exposure")))], ecards))
    return items


#: Pixel of the convergence map written beside a lensed run (arcsec).
CONVERGENCE_PIXEL_ARCSEC = 0.2


def write_lens_maps(out: Path, lens, sc: Scenario, mgrid: Grid, hx: float, hy: float,
                     prov) -> list[Path]:
    """Convergence map (FITS), critical curves and caustics (ECSV) and a picture (PNG), all
    for sources at ``lens.reference_redshift``, over the area the sources are drawn on: the
    mosaic ``mgrid`` and a margin around it, ``hx``, ``hy`` half its sides (arcsec)."""
    from .lensing import critical_curves, write_lens_png

    z_ref = sc.lens.reference_redshift
    files = []
    step = CONVERGENCE_PIXEL_ARCSEC
    kgrid = Grid(int(np.ceil(2 * hx / step)), int(np.ceil(2 * hy / step)), step, mgrid.ra0,
                 mgrid.dec0)
    xi, eta = kgrid.pixel_offsets()
    kappa = lens.convergence(xi, eta, z_ref).reshape(kgrid.shape)
    # the mosaic's footprint, centred on the map (xi east, eta north; arcsec)
    fx, fy = 0.5 * mgrid.nx * mgrid.scale, 0.5 * mgrid.ny * mgrid.scale
    cards = [("ZSOURCE", z_ref, "source redshift of the map"),
             ("ZLENS", sc.lens.redshift, "lens redshift"),
             ("MOSAICW", round(2 * fx, 6), "[arcsec] width of the mosaic, centred here"),
             ("MOSAICH", round(2 * fy, 6), "[arcsec] height of the mosaic, centred here"),
             ("MARGIN", round(hx - fx, 6), "[arcsec] map covers the mosaic + this margin")]
    files.append(write_fits(out / "convergence.fits",
                            [image_hdu(kappa.astype(np.float32), "KAPPA", kgrid, "", cards)],
                            prov, cards))
    cc = critical_curves(lens, z_ref, (-hx, hx, -hy, hy), 0.1)
    rows = []
    for kind, curves in (("critical", cc.critical), ("caustic", cc.caustic)):
        for i, c in enumerate(curves):
            for x, y in c:
                rows.append((kind, i, x, y))
    t = Table(rows=rows or None, names=("kind", "curve", "xi", "eta"),
              dtype=("U8", "i4", "f8", "f8"))
    ra, dec = mgrid.offsets_to_sky(np.asarray(t["xi"], float), np.asarray(t["eta"], float))
    t["ra"], t["dec"] = ra, dec
    t["xi"].unit = t["eta"].unit = "arcsec"
    t["ra"].unit = t["dec"].unit = "deg"
    t.meta["description"] = (f"critical curves (image plane) and caustics (source plane) for "
                             f"sources at z = {z_ref}; xi east, eta north; over the mosaic "
                             f"({2 * fx:g} x {2 * fy:g} arcsec) and a {hx - fx:g} arcsec margin")
    files.append(write_table(out / "critical_curves.ecsv", t, prov))
    write_lens_png(lens, out / "lens.png", (-hx, hx, -hy, hy), 0.1, z_ref, seed=sc.seed,
                   field_arcsec=(-fx, fx, -fy, fy))
    files.append(out / "lens.png")
    return files


def band_cards(b: Band, zp: float):
    return [("BAND", b.name, "simfield band name"),
            ("PIVOT", round(b.pivot_nm, 4), "[nm] pivot wavelength"),
            ("ZP_AB", round(zp, 5), "[mag] AB magnitude of 1 e-/s"),
            ("FLUXNJY", float(ab_to_njy(zp)), "[nJy] flux density giving 1 e-/s")]


def image_hdu(data, name, grid: Grid, bunit: str, cards=()) -> fits.ImageHDU:
    hdu = fits.ImageHDU(np.ascontiguousarray(data), name=name)
    hdu.header.update(grid.wcs.to_header())
    hdu.header["BUNIT"] = bunit
    for k, v, c in cards:
        hdu.header[k] = (v, c)
    return hdu


def write_psf(path, core, wide, eff, b: Band, prov, cards=(), extra=()) -> Path:
    def hdu(p, name, desc):
        h = fits.ImageHDU(p.image.astype(np.float32), name=name)
        h.header["PIXSCALE"] = (p.scale_arcsec, "[arcsec] PSF pixel")
        h.header["PIVOT"] = (round(b.pivot_nm, 4), "[nm] pivot wavelength")
        h.header["FWHM"] = (round(float(p.fwhm_arcsec), 6), "[arcsec] full width at half max")
        h.header["NORM"] = ("sum=1", "image normalised to unit sum")
        h.header["PSFDESC"] = desc
        return h

    ee = Table({"radius": np.asarray(eff.ee_radii_arcsec, float),
                "ee": np.asarray(eff.ee_values, float)})
    ee["radius"].unit = "arcsec"
    ee_hdu = fits.BinTableHDU(ee, name="EE")
    ee_hdu.header["COMMENT"] = "encircled energy of the PSF including the detector pixel"
    hdus = [hdu(core, "PSF", "optics+jitter sampled at scene-pixel centres"),
            hdu(wide, "PSF_WIDE", "large PSF used for bright sources"),
            hdu(eff, "PSF_DET", "PSF convolved with the detector pixel"), ee_hdu, *extra]
    for k, v, c in cards:
        hdus[0].header[k] = (v, c)
    return write_fits(path, hdus, prov, [("BAND", b.name, "simfield band name")])


def write_truth(path, sources: Table, images: Table, grid: Grid, prov) -> Path:
    from .columns import IMAGE_COLUMNS, TRUTH_COLUMNS, describe, table_hdu

    s = sources.copy()
    ra, dec = grid.offsets_to_sky(np.asarray(s["x_arcsec"], float),
                                  np.asarray(s["y_arcsec"], float))
    x, y = grid.offsets_to_pixel(np.asarray(s["x_arcsec"], float),
                                 np.asarray(s["y_arcsec"], float))
    s["ra"], s["dec"], s["x"], s["y"] = ra, dec, x, y
    im = images.copy()
    im["image_id"] = np.arange(1, len(im) + 1)
    ra, dec = grid.offsets_to_sky(np.asarray(im["x_arcsec"], float),
                                  np.asarray(im["y_arcsec"], float))
    x, y = grid.offsets_to_pixel(np.asarray(im["x_arcsec"], float),
                                 np.asarray(im["y_arcsec"], float))
    im["ra"], im["dec"], im["x"], im["y"] = ra, dec, x, y
    im["in_mosaic"] = grid.contains(x, y)
    # a signed integer: FITS has no signed byte, and astropy writes int8 as a logical
    im["parity"] = np.asarray(im["parity"], np.int16)
    for t in (s, im):
        t["ra"].unit = t["dec"].unit = "deg"
        t["x"].unit = t["y"].unit = "pix"
        t["x_arcsec"].unit = t["y_arcsec"].unit = "arcsec"
        t.meta["PIXCONV"] = "x, y: 0-based mosaic pixels, centre of first pixel = (0, 0)"
        t.meta["OFFSETS"] = "x_arcsec, y_arcsec: tangent-plane offsets, xi east, eta north"
    cols = ["image_id", "source_id"] + [c for c in im.colnames
                                        if c not in ("image_id", "source_id")]
    im = im[cols]
    first = ["id", "kind", "ra", "dec", "x", "y"]
    s = s[first + [c for c in s.colnames if c not in first]]
    for c in s.colnames:
        if s[c].dtype.kind == "U":
            s[c] = s[c].astype("S")
    describe(s, TRUTH_COLUMNS)
    describe(im, TRUTH_COLUMNS, IMAGE_COLUMNS)
    notes = {**sources.meta, **images.meta}
    s.meta, im.meta = {}, {}
    hdus = [table_hdu(s, "SOURCES"), table_hdu(im, "IMAGES")]
    for h in hdus:
        h.header["PIXCONV"] = ("0-based", "x, y: 0-based mosaic pixels, first pixel (0, 0)")
        h.header["OFFSETS"] = ("xi east, eta north", "x_arcsec, y_arcsec: tangent plane")
        for k, v in notes.items():
            if isinstance(v, (str, int, float)):
                h.header.add_comment(f"{k}: {v}")
    return write_fits(path, hdus, prov)

