"""A run's photometric redshifts: read ``photometry.fits``, write ``photoz.fits``.

``photoz.fits`` holds ``PHOTOZ`` (one row per object of ``PHOTOMETRY``, see
:func:`photoz_table`), ``PZ`` (image, n_rows x n_z, float32: P(z) per unit z of each row,
integrating to 1 over the grid by the trapezoid rule) and ``ZGRID`` (the redshifts of the PZ
columns). The fluxes used are the PSF-matched total fluxes ``flux_<band>`` and errors
``flux_err_<band>`` (nJy) of every scenario band that the table has.

Units: fluxes in nJy, redshifts dimensionless.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

from ..bands import make_band
from ..columns import table_hdu
from ..errors import CatalogError
from ..io import write_fits
from .fit import PhotozResult, fit_photoz, interval_quantiles
from .prior import make_prior
from .templates import build_templates, default_families, redshift_grid

__all__ = ["cut_column", "photoz_table", "fit_run"]


def cut_column(cut: float) -> str:
    """Column name of P(z > cut): ``p_gt_6p5`` for 6.5, ``p_gt_7`` for 7."""
    return "p_gt_" + f"{cut:g}".replace(".", "p")


def photoz_table(ids, res: PhotozResult, template_names) -> Table:
    """The ``PHOTOZ`` table of :func:`fit_photoz` results, with units and descriptions."""
    lo, hi = interval_quantiles
    t = Table()
    cols = [
        ("id", np.asarray(ids), "", "id of the object in photometry.fits"),
        ("z_best", res.z_best, "", "mode of P(z) (grid redshift where P(z) peaks)"),
        ("z_lo", res.z_lo, "", f"lower end of the central 68% interval of P(z) (CDF = {lo:g})"),
        ("z_hi", res.z_hi, "", f"upper end of the central 68% interval of P(z) (CDF = {hi:g})"),
        ("chi2_best", res.chi2_best, "", "smallest chi2 over templates and redshifts"),
        ("template_best", np.asarray(template_names)[res.template_best], "",
         "template of chi2_best"),
        ("n_bands", res.n_bands, "", "bands used (finite flux, finite positive error)"),
    ]
    cols += [(cut_column(c), p, "", f"P(z > {c:g}) from the CDF of P(z)")
             for c, p in res.p_gt.items()]
    for name, data, unit, desc in cols:
        t[name] = data
        t[name].unit = unit or None
        t[name].description = desc
    return t


def _read_photometry(path: Path, band_names):
    if not path.exists():
        raise CatalogError(f"{path} not found: photoz reads the multi-band photometry table "
                           "(HDU PHOTOMETRY) of the run; run the photometry first")
    tab = Table.read(path, hdu="PHOTOMETRY")
    used = [b for b in band_names if f"flux_{b}" in tab.colnames
            and f"flux_err_{b}" in tab.colnames]
    if "id" not in tab.colnames or len(used) < 2:
        raise CatalogError(f"{path.name}: PHOTOMETRY needs column id and flux_<band>, "
                           f"flux_err_<band> for at least two of: {', '.join(band_names)} "
                           f"(has: {', '.join(tab.colnames)})")
    flux = np.column_stack([np.asarray(tab[f"flux_{b}"], dtype=float) for b in used])
    err = np.column_stack([np.asarray(tab[f"flux_err_{b}"], dtype=float) for b in used])
    return tab["id"], used, flux, err


def fit_run(out_dir, sc, prov) -> dict:
    """Fit ``photometry.fits`` of the run in ``out_dir``; write ``photoz.fits``.

    Parameters
    ----------
    out_dir : path
        Run directory.
    sc : Scenario
        Uses ``sc.photoz``, ``sc.telescope.bands`` and ``sc.population.abs_mag_faint``.
    prov : Provenance

    Returns
    -------
    dict
        Counts, grid and template sizes, the fit's wall time (s) and, per cut, the number of
        objects with P(z > cut) > 0.5.
    """
    out = Path(out_dir)
    cfg = sc.photoz
    ids, used, flux, err = _read_photometry(out / "photometry.fits", sc.band_names)
    bands = [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
             for b in sc.telescope.bands if b.name in used]
    z = redshift_grid(cfg.z_min, cfg.z_max, cfg.dz_over_1pz)
    tset = build_templates(bands, z, default_families(cfg.betas, cfg.a_v, cfg.line_ew_nm,
                                                         cfg.sf_breaks))
    t0 = time.perf_counter()
    res = fit_photoz(flux, err, tset, cfg.z_cuts,
                     make_prior(cfg.prior, z, sc.population.abs_mag_faint))
    dt = time.perf_counter() - t0
    table = photoz_table(ids, res, tset.names)
    from .stars import dwarf_templates, fit_stars

    chi2_star, star_type = fit_stars(flux, err, dwarf_templates(bands))
    table["chi2_star"] = chi2_star
    table["chi2_star"].description = "smallest chi2 of the cool-dwarf star templates (z = 0)"
    table["star_type"] = star_type
    table["star_type"].description = "spectral type of that template (M0 = 10, L0 = 20, T0 = 30)"
    table["star_like"] = chi2_star < np.asarray(res.chi2_best, float)
    table["star_like"].description = ("a dwarf star fits better than any galaxy "
                                       "(chi2_star < chi2_best)")
    cards = [("PRIOR", cfg.prior, "P(z) prior (none: flat in z)"),
             ("NTEMPL", len(tset.names), "templates fitted"),
             ("BANDS", ",".join(used), "bands fitted (flux_<band> of PHOTOMETRY)"),
             ("DZ1PZ", cfg.dz_over_1pz, "redshift grid step in ln(1+z)")]
    hdu = table_hdu(table, "PHOTOZ")
    pz = fits.ImageHDU(res.pz, name="PZ")
    pz.header["BUNIT"] = ("1", "P(z) per unit redshift; row i = PHOTOZ row i")
    zg = Table({"z": z})
    zg["z"].description = "redshift of PZ column j (uniform in ln(1+z))"
    write_fits(out / "photoz.fits", [hdu, pz, table_hdu(zg, "ZGRID")], prov, cards)
    return {"n_objects": int(len(table)), "n_templates": len(tset.names), "n_z": int(z.size),
            "bands": used, "fit_time_s": round(dt, 3),
            "n_p_gt_half": {cut_column(c): int(np.sum(p > 0.5)) for c, p in res.p_gt.items()},
            "n_star_like": int(np.sum(table["star_like"]))}
