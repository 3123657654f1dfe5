"""Tests of simfield.io: FITS images written by sections.

Comparison to outside sources: astropy.io.fits reads and verifies the files (the FITS standard
4.0, Pence et al. 2010, A&A 524, A42: 2880-byte records, big-endian data); numpy holds the
expected arrays.
"""

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from numpy.testing import assert_array_equal

from simfield.grid import Grid
from simfield.io import ImageSpec, Provenance, section_files

PROV = Provenance(3, "0123456789abcdef", "seed: 3\n")


def test_sections_read_back_through_astropy(tmp_path):
    """Sections written through the memory maps read back with astropy, headers intact."""
    g = Grid(70, 45, 0.04, 150.0, 2.0)
    hdr = g.wcs.to_header()
    hdr["BUNIT"] = "electron/s"
    specs = [ImageSpec("IMAGE", g.shape, np.float32, hdr), ImageSpec("FLAGS", g.shape, np.int32,
                                                                    [("BUNIT", "", "bits")])]
    rng = np.random.default_rng(0)
    sci = rng.normal(size=g.shape).astype(np.float32)
    dq = rng.integers(0, 64, g.shape).astype(np.int32)
    with section_files([(tmp_path / "m.fits", specs, [("BAND", "b10", "band")])], PROV) as (f,):
        for y0 in range(0, g.ny, 20):  # in strips, as tiles do
            f.array("IMAGE")[y0:y0 + 20, :30] = sci[y0:y0 + 20, :30]
            f.array("IMAGE")[y0:y0 + 20, 30:] = sci[y0:y0 + 20, 30:]
        f.array("FLAGS")[:] = dq
    with fits.open(tmp_path / "m.fits") as hl:
        hl.verify("exception")
        assert_array_equal(hl["IMAGE"].data, sci)
        assert_array_equal(hl["FLAGS"].data, dq)
        assert hl[0].header["BAND"] == "b10" and hl[0].header["SIMFSEED"] == 3
        assert hl["IMAGE"].header["BUNIT"] == "electron/s"
        w = WCS(hl["IMAGE"].header)
        assert np.allclose(w.all_pix2world(3.0, 4.0, 0), g.pixel_to_sky(3.0, 4.0), atol=1e-10)
    assert list(tmp_path.iterdir()) == [tmp_path / "m.fits"]


def test_failure_leaves_no_file(tmp_path):
    """An error inside the block removes every partly written file (common practice)."""
    specs = [ImageSpec("IMAGE", (10, 10), np.float32)]
    with pytest.raises(RuntimeError, match="stop"):
        with section_files([(tmp_path / "a.fits", specs, []), (tmp_path / "b.fits", specs, [])],
                           PROV) as files:
            files[0].array("IMAGE")[:] = 1.0
            raise RuntimeError("stop")
    assert list(tmp_path.iterdir()) == []


def test_unsupported_dtype_refused(tmp_path):
    """A dtype FITS cannot hold without scaling is refused by name."""
    with pytest.raises(ValueError, match="uint32"):
        with section_files([(tmp_path / "a.fits", [ImageSpec("X", (4, 4), np.uint32)], [])],
                           PROV):
            pass
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("config", [
    "seed: 3\nsurvey:\n  name: quick\n",
    "note: " + "a long line of configuration text " * 5 + "\n  x: 1\n",  # > 72 characters
    "label: caf\u00e9\n",  # not ASCII: astropy's own path, which refuses it
])
def test_primary_header_equals_astropys_history_cards(tmp_path, config):
    """The primary header (the configuration as HISTORY, formatted in one string) is byte for
    byte the header astropy makes with ``add_history`` line by line (lines longer than 72
    characters cut into cards of 72, FITS Standard 4.0 section 4.4.2.4); text astropy refuses
    is refused the same way."""
    from simfield.io import write_fits

    prov = Provenance(3, "0123456789abcdef", config)
    extra = [("BAND", "b10", "band")]
    ref = fits.PrimaryHDU().header
    try:
        for key, value, comment in prov.header_cards(full=True) + extra:
            if key == "HISTORY":
                ref.add_history(value)
            else:
                ref[key] = (value, comment)
        expected = ref.tostring()
    except ValueError as exc:
        with pytest.raises(ValueError, match=str(exc)[:30]):
            write_fits(tmp_path / "a.fits", [fits.ImageHDU(np.zeros((2, 2)))], prov, extra)
        return
    write_fits(tmp_path / "a.fits", [fits.ImageHDU(np.zeros((2, 2)))], prov, extra)
    with section_files([(tmp_path / "b.fits", [], extra)], prov):
        pass
    for name in ("a.fits", "b.fits"):
        raw = (tmp_path / name).read_bytes()
        assert raw[:len(expected)].decode("ascii") == expected, name
