"""Column units and descriptions of the written tables; truth parity as a signed integer."""

import numpy as np
from astropy.io import fits
from astropy.table import Table
from numpy.testing import assert_array_equal

from simfield.columns import SCORE_COLUMNS, TRUTH_COLUMNS, describe
from simfield.grid import Grid
from simfield.io import Provenance


def _truth(tmp_path):
    from simfield._products import write_truth

    n = 3
    src = Table({"id": np.arange(1, n + 1), "kind": ["galaxy", "galaxy", "star"],
                 "x_arcsec": [0.1, -0.2, 0.3], "y_arcsec": [0.0, 0.2, -0.1],
                 "redshift": [6.0, 9.0, 0.0], "mag_b17": [27.0, 28.0, 20.0],
                 "r_half": [0.1, 0.05, 0.0], "magnification": [2.0, 1.0, 1.0],
                 "n_images": np.array([2, 1, 1], np.int32)})
    img = Table({"source_id": [1, 1, 2, 3], "image": np.array([0, 1, 0, 0], np.int16),
                 "x_arcsec": [0.1, 0.5, -0.2, 0.3], "y_arcsec": [0.0, 0.1, 0.2, -0.1],
                 "magnification": [1.5, -0.5, 1.0, 1.0],
                 "parity": np.array([1, -1, 1, 1], np.int16),
                 "mag_b17": [26.6, 27.75, 28.0, 20.0]})
    path = write_truth(tmp_path / "truth.fits", src, img, Grid(50, 50, 0.03, 150.0, 2.0),
                        Provenance(1, "0" * 16, "seed: 1\n"))
    return path


def test_parity_reads_back_as_signed_integer(tmp_path):
    """A mirrored image's parity -1 reads back as -1 (int16), not as a FITS logical."""
    path = _truth(tmp_path)
    with fits.open(path) as hl:
        col = hl["IMAGES"].columns["parity"]
        assert col.format == "I"  # FITS standard: 16-bit signed integer
        assert_array_equal(hl["IMAGES"].data["parity"], [1, -1, 1, 1])
    t = Table.read(path, hdu="IMAGES")
    assert t["parity"].dtype.kind == "i" and list(t["parity"]) == [1, -1, 1, 1]


def test_truth_magnitudes_carry_unit_mag_and_every_known_column_a_description(tmp_path):
    """TUNITn = 'mag' on every magnitude column of SOURCES and IMAGES; each column that has a
    description gets it (astropy column metadata and the TTYPEn comment)."""
    path = _truth(tmp_path)
    with fits.open(path) as hl:
        for ext in ("SOURCES", "IMAGES"):
            cols = hl[ext].columns
            assert cols["mag_b17"].unit == "mag"
            assert cols["ra"].unit == "deg" and cols["x"].unit == "pix"
            h = hl[ext].header
            i = cols.names.index("mag_b17") + 1
            assert "AB magnitude" in h.comments[f"TTYPE{i}"]
    for ext in ("SOURCES", "IMAGES"):
        t = Table.read(path, hdu=ext)
        missing = [c for c in t.colnames if not t[c].description]
        assert missing == [], (ext, missing)
    im = Table.read(path, hdu="IMAGES")
    assert "observed (lensed)" in im["mag_b17"].description
    assert "intrinsic" in Table.read(path, hdu="SOURCES")["mag_b17"].description


def test_describe_matches_band_patterns_and_keeps_unknown_columns():
    """'mag_<band>' patterns match any band name; unknown columns are left as they are."""
    t = Table({"mag_b36": [1.0], "other": [2.0], "v_eff_mpc3": [3.0]})
    t["other"].unit = "s"
    describe(t, TRUTH_COLUMNS)
    describe(t, SCORE_COLUMNS)
    assert t["mag_b36"].unit == "mag" and "b36" in t["mag_b36"].description
    assert t["other"].unit == "s" and t["other"].description is None
    assert t["v_eff_mpc3"].unit == "Mpc3"
