"""Units and descriptions of the columns of simfield's output tables.

One place says what every written column means: :func:`describe` sets ``.unit`` and
``.description`` of the columns it knows (a table written to ECSV keeps both; a FITS table keeps
the unit as ``TUNITn``, the description in astropy's column metadata and as the comment of
``TTYPEn``, see :func:`describe_fits_header`). Columns named ``mag_<band>`` or ``<name>_<band>``
are matched on their pattern.

Units: deg (RA, Dec), arcsec (tangent-plane offsets xi east, eta north; sizes), pix (0-based
mosaic pixels, first pixel centred on (0, 0)), mag (AB), Mpc3 (comoving volumes).
"""

from __future__ import annotations

import re

from astropy.table import Table

__all__ = ["SOURCE_KINDS", "POINT_KINDS", "TRUTH_COLUMNS", "IMAGE_COLUMNS", "SCORE_COLUMNS",
           "SCORE_TABLES", "PHOTOMETRY_COLUMNS", "describe", "describe_fits_header", "table_hdu"]

_POS = {
    "ra": ("deg", "right ascension (ICRS)"),
    "dec": ("deg", "declination (ICRS)"),
    "x": ("pix", "0-based mosaic column, first pixel centred on 0"),
    "y": ("pix", "0-based mosaic row, first pixel centred on 0"),
    "x_arcsec": ("arcsec", "tangent-plane offset xi from the field centre, increasing to the "
                          "east, so it runs opposite to pixel x (east is left, -x, at survey.roll_deg 0)"),
    "y_arcsec": ("arcsec", "tangent-plane offset eta from the field centre, increasing to the "
                          "north, like pixel y at survey.roll_deg 0"),
}

#: every ``kind`` of the SOURCES table
SOURCE_KINDS = ("galaxy", "star", "dwarf", "dusty", "quiescent", "member", "icl")
#: SOURCES kinds drawn as points (no shape) and never counted as galaxies
POINT_KINDS = ("star", "dwarf")

#: (unit, description) of the truth tables' columns (SOURCES and IMAGES of truth.fits);
#: patterns with ``{band}`` match any band name
TRUTH_COLUMNS = {
    **_POS,
    "id": ("", "source id (1-based)"),
    "kind": ("", "galaxy (light cone), star, dwarf (cool M/L/T dwarf star), dusty (dusty "
                 "star-forming galaxy), quiescent (strong-Balmer-break galaxy), member "
                 "(cluster galaxy) or icl (intracluster light)"),
    "redshift": ("", "redshift"),
    "abs_mag_uv": ("mag", "rest-frame UV (150 nm) absolute AB magnitude before dust; NaN for "
                          "stars and dwarfs"),
    "mag_{band}": ("mag", "intrinsic (unlensed) AB magnitude in band {band}"),
    "r_half": ("arcsec", "intrinsic half-light radius along the major axis, at the rest "
                         "wavelength of the size relation (150 nm star-forming, 550 nm "
                         "evolved)"),
    "r_half_kpc": ("kpc", "half-light radius (proper)"),
    "sersic_n": ("", "Sersic index (of a one-component galaxy)"),
    "n_components": ("", "2 for a bulge (Sersic n = 4) + exponential disk galaxy, else 1"),
    "bulge_fraction": ("", "bulge-to-total flux ratio at rest 550 nm (0: one component)"),
    "r_half_bulge": ("arcsec", "half-light radius of the bulge (0: one component)"),
    "r_half_disk": ("arcsec", "half-light radius of the disk (of the single profile for one "
                              "component)"),
    "bt_{band}": ("", "bulge-to-total flux ratio in band {band}"),
    "r_half_{band}": ("arcsec", "half-light radius of the galaxy's light in band {band} "
                                "(bulge + disk)"),
    "axis_ratio": ("", "minor / major axis ratio"),
    "position_angle": ("deg", "major axis, east of north"),
    "beta_uv": ("", "rest-UV slope of f_lambda ~ lambda^beta"),
    "beta_opt": ("", "rest-optical slope of f_lambda ~ lambda^beta"),
    "break_strength": ("", "strength of the Balmer / 400 nm break"),
    "template": ("", "spectral family: starforming, evolved, star, dusty, quiescent or dwarf"),
    "knot_fraction": ("", "fraction of the light in star-forming knots"),
    "n_knots": ("", "number of star-forming knots"),
    "knot_seed": ("", "seed of the knots' positions"),
    "teff": ("K", "effective temperature of a star or dwarf; NaN for galaxies"),
    "spectral_type": ("", "dwarf spectral type as a number: M0 = 10, L0 = 20, T0 = 30 (L5.5 = "
                          "25.5); NaN otherwise"),
    "dust_av": ("mag", "V-band attenuation (Calzetti et al. 2000 curve); 0 for dust-free "
                       "galaxies, NaN for point sources"),
    "ew_halpha": ("Angstrom", "rest-frame equivalent width of Halpha; 0 without lines, NaN "
                              "for point sources"),
    "ew_oiii_hbeta": ("Angstrom", "rest-frame equivalent width of Hbeta + [OIII] 495.9 + "
                                  "500.7; 0 without lines, NaN for point sources"),
    "ew_oii": ("Angstrom", "rest-frame equivalent width of [OII] 372.7; 0 without lines, NaN "
                           "for point sources"),
    "sigma_kms": ("km / s", "velocity dispersion of a cluster member"),
    "magnification": ("", "lensing magnification (IMAGES: signed, of the image; SOURCES: sum "
                          "of |mu| over the images)"),
    "n_images": ("", "number of images of the source"),
    "image_id": ("", "image id (1-based)"),
    "source_id": ("", "id of the source (SOURCES.id) this is an image of"),
    "image": ("", "rank of the image among its source's images by |mu| (0 = brightest)"),
    "parity": ("", "image parity: +1 direct, -1 mirrored (sign of the lensing Jacobian)"),
    "in_mosaic": ("", "whether the position falls on the mosaic"),
}

#: overrides for IMAGES: its magnitudes are the observed (lensed) ones
IMAGE_COLUMNS = {"mag_{band}": ("mag", "observed (lensed) AB magnitude of the image in band "
                                       "{band}: intrinsic - 2.5 log10 |mu|")}

#: (unit, description) of the score tables' columns (ECSV under the score folder)
SCORE_COLUMNS = {
    **_POS,
    "mag_lo": ("mag", "bin lower edge, AB"), "mag_hi": ("mag", "bin upper edge, AB"),
    "mag_mid": ("mag", "bin centre, AB"),
    "r_half_lo": ("arcsec", "bin lower edge, observed half-light radius"),
    "r_half_hi": ("arcsec", "bin upper edge, observed half-light radius"),
    "r_half_mid": ("arcsec", "bin centre, observed half-light radius"),
    "sb_lo": ("mag / arcsec2", "bin lower edge, mean surface brightness inside r_half"),
    "sb_hi": ("mag / arcsec2", "bin upper edge, mean surface brightness inside r_half"),
    "sb_mid": ("mag / arcsec2", "bin centre, mean surface brightness inside r_half"),
    "z_lo": ("", "bin lower edge, redshift"), "z_hi": ("", "bin upper edge, redshift"),
    "z_mid": ("", "bin centre, redshift"),
    "mu_lo": ("", "bin lower edge, |magnification|"),
    "mu_hi": ("", "bin upper edge, |magnification|"), "mu_mid": ("", "bin centre, |mu|"),
    "abs_mag_uv_lo": ("mag", "bin lower edge, rest-UV absolute AB magnitude"),
    "abs_mag_uv_hi": ("mag", "bin upper edge, rest-UV absolute AB magnitude"),
    "n": ("", "sources (or detections) in the bin"),
    "k": ("", "of them recovered (or matched)"),
    "fraction": ("", "k / n; NaN where n = 0"),
    "fraction_lo": ("", "lower end of the interval of the fraction"),
    "fraction_hi": ("", "upper end of the interval of the fraction"),
    "median": ("mag", "median measured - true magnitude"),
    "nmad": ("mag", "1.4826 x median absolute deviation of measured - true magnitude"),
    "mean": ("mag", "mean measured - true magnitude"),
    "std": ("mag", "standard deviation of measured - true magnitude"),
    "row": ("", "row of the detection in the catalogue file (0-based)"),
    "mag": ("mag", "measured AB magnitude of the detection"),
    "cause": ("", "likely cause of the unmatched detection"),
    "volume_mpc3": ("Mpc3", "comoving volume of the redshift bin over the mosaic area"),
    "v_eff_mpc3": ("Mpc3", "recovered fraction x comoving volume; masked where n = 0"),
    "id": ("", "truth source id"),
    "kind": ("", "truth source kind"),
    "mag_obs": ("mag", "observed AB magnitude of the source's brightest image"),
    "r_half_obs": ("arcsec", "observed half-light radius (intrinsic x sqrt|mu|)"),
    "redshift": ("", "redshift"),
    "magnification": ("", "|magnification| of the brightest image"),
    "recovered": ("", "whether any image of the source was matched"),
    "det_row": ("", "catalogue row of the matched detection (0-based), -1 if none"),
}

#: (unit, description) of the columns of photometry.fits (HDU PHOTOMETRY)
PHOTOMETRY_COLUMNS = {
    **_POS,
    "id": ("", "detection id (DETECTIONS.id of the detection band)"),
    # the longer patterns first: "flux_{band}" would also match "flux_native_err_b10"
    "flux_native_err_{band}": ("nJy", "1-sigma error of flux_native_{band}: F(r) sqrt(sum "
                                      "1/INVVAR) / EE"),
    "flux_native_{band}": ("nJy", "native-resolution aperture flux in {band}, corrected to "
                                  "total by the band's own encircled energy"),
    "flux_err_{band}": ("nJy", "1-sigma error of flux_{band}, with the noise correlation of "
                               "the mosaic and of the matching kernel"),
    "flux_{band}": ("nJy", "PSF-matched aperture flux in {band}, corrected to total by the "
                           "target PSF's encircled energy; use for colours"),
    "flags_{band}": ("", "OR of the mosaic FLAGS of {band} over the aperture"),
}

#: what each score table holds (``meta["description"]`` of ``<name>.ecsv``)
SCORE_TABLES = {
    "completeness_mag": "fraction of truth galaxies recovered per bin of observed magnitude",
    "completeness_size": "fraction of truth galaxies recovered per bin of observed half-light "
                         "radius",
    "completeness_sb": "fraction of truth galaxies recovered per bin of mean surface brightness",
    "completeness_z": "fraction of truth galaxies recovered per redshift bin",
    "completeness_mu": "fraction of truth galaxies recovered per bin of |magnification|",
    "completeness_mag_size": "fraction of truth galaxies recovered per (magnitude, size) cell",
    "purity_mag": "fraction of detections matched to a truth image, per measured magnitude",
    "false_detections": "every unmatched detection with its likely cause",
    "photometry": "measured - true magnitude of matched pairs, per true observed magnitude",
    "effective_volume": "recovered fraction x comoving volume per (M_UV, z) cell",
    "recovered": "each truth source with an image on the mosaic: recovered or not, and its "
                 "matched detection",
}


def _lookup(name: str, spec: dict):
    if name in spec:
        return spec[name]
    for key, (unit, desc) in spec.items():
        if "{band}" in key:
            m = re.fullmatch(re.escape(key).replace(r"\{band\}", "(?P<band>.+)"), name)
            if m:
                return unit, desc.format(band=m.group("band"))
    return None


def describe(t: Table, spec: dict, *overrides: dict) -> Table:
    """Set unit and description of every column of ``t`` found in ``spec`` (in place).

    Parameters
    ----------
    t : Table
    spec : dict {name: (unit, description)}
        E.g. :data:`TRUTH_COLUMNS`; ``{band}`` in a name matches any band.
    *overrides : dict
        Entries that win over ``spec``.

    Returns
    -------
    Table
        ``t``; a unit already on a column is replaced only where ``spec`` gives one.
    """
    for name in t.colnames:
        hit = next((h for h in (_lookup(name, o) for o in overrides[::-1]) if h), None) \
            or _lookup(name, spec)
        if hit is None:
            continue
        unit, desc = hit
        if unit:
            t[name].unit = unit
        t[name].description = desc
    return t


def describe_fits_header(header, t: Table) -> None:
    """Put each column's description of ``t`` as the comment of its ``TTYPEn`` card."""
    for i, name in enumerate(t.colnames, start=1):
        desc = t[name].description
        if desc and header.get(f"TTYPE{i}") == name:
            # an 80-character card: keyword, "= ", the quoted name (>= 20 wide), " / "
            header.comments[f"TTYPE{i}"] = desc[:min(47, 67 - max(len(name) + 2, 20))]


def table_hdu(t: Table, name: str):
    """A FITS binary table of ``t`` that keeps units (``TUNITn``) and descriptions.

    The descriptions go into astropy's serialized column metadata (read back by
    ``Table.read``), which only ``Table.write`` produces, so the table is written to memory
    and read back as an HDU; they also go into the ``TTYPEn`` comments.

    Parameters
    ----------
    t : Table
    name : str
        Extension name.

    Returns
    -------
    astropy.io.fits.BinTableHDU
    """
    import io

    from astropy.io import fits

    buf = io.BytesIO()
    t.write(buf, format="fits")
    buf.seek(0)
    with fits.open(buf) as hl:
        hdu = fits.BinTableHDU(data=hl[1].data.copy(), header=hl[1].header.copy(), name=name)
    describe_fits_header(hdu.header, t)
    return hdu
