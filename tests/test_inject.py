"""Injection into a user's image: sources land where the truth says, are recovered, scored."""

import json

import galsim
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from numpy.testing import assert_allclose

from simfield.errors import CatalogError
from simfield.grid import Grid
from simfield.inject import inject_into_image
from tests.conftest import make_scenario


def _user_image(path, with_zp=True):
    """A 'real' image: Gaussian noise of rms 0.01 on a rotated TAN WCS, 0.05"/pix."""
    g = Grid(320, 300, 0.05, 53.1, -27.8, roll_deg=20.0)
    rng = np.random.default_rng(5)
    h = fits.Header(g.wcs.to_header())
    if with_zp:
        h["ZP_AB"] = 28.0
    fits.writeto(path, rng.normal(0, 0.01, g.shape).astype(np.float32), h, overwrite=True)
    return g


def _psf_file(path):
    """A Moffat PSF (GalSim, reference library) at the image scale, FWHM 0.15"."""
    img = galsim.Moffat(beta=3, fwhm=0.15).drawImage(nx=41, ny=41, scale=0.05).array
    h = fits.Header()
    h["PIXSCALE"] = 0.05
    fits.writeto(path, img, h, overwrite=True)


@pytest.fixture(scope="module")
def injected(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("inj")
    _user_image(tmp / "user.fits")
    _psf_file(tmp / "psf.fits")
    sc = make_scenario("population=uniform", "population.uniform_mag_min=21",
                       "population.uniform_mag_max=23", "population.uniform_density_arcmin2=80",
                       "population.z_min=5", "population.z_max=8", "population.clumpy=false", "population.star_density_arcmin2=100", "population.star_mag_min=21",
                       "population.star_mag_max=23",
                       "score.report=false", "score.mag_min=20", "score.mag_max=26",
                       "score.reference_mag=24")
    summary = inject_into_image(tmp / "user.fits", sc, "b23", tmp / "out", tmp / "psf.fits")
    return tmp / "out", summary


def test_bright_injected_sources_are_recovered(injected):
    """Isolated sources ~100 sigma above the noise, away from the edges, are all found
    (common practice: S/N > 10 is complete for isolated sources)."""
    out, summary = injected
    assert summary["n_injected"] > 10
    rec = Table.read(out / "score" / "b23" / "recovered.ecsv")
    src = Table.read(out / "truth.fits", hdu="SOURCES")
    x, y = np.asarray(src["x"]), np.asarray(src["y"])
    nn = np.array([np.sort(np.hypot(x - a, y - b))[1] for a, b in zip(x, y)])
    clean = (nn > 20) & (x > 20) & (x < 300) & (y > 20) & (y < 280)
    assert clean.sum() >= 5
    assert np.all(rec["recovered"][np.isin(rec["id"], src["id"][clean])])
    assert json.loads((out / "score" / "b23" / "summary.json").read_text())["band"] == "b23"


def test_injected_light_sits_at_truth_positions_with_truth_flux(injected):
    """The injected light (model image) totals the truth fluxes, and each isolated star's
    light is centred on its truth position (centroid of a centrosymmetric PSF, common
    practice)."""
    out, _ = injected
    src = Table.read(out / "truth.fits", hdu="SOURCES")
    model = fits.getdata(out / "truth_image_b23.fits", "IMAGE").astype(float)
    rate = 10 ** (-0.4 * (src["mag_b23"] - 28.0))
    m = 30  # pixels; sources straddling the box edge make the comparison a bracket
    box = model[m:300 - m, m:320 - m].sum()
    x, y = np.asarray(src["x"]), np.asarray(src["y"])
    inner = (x > m + 30) & (x < 320 - m - 30) & (y > m + 30) & (y < 300 - m - 30)
    outer = (x > m - 30) & (x < 320 - m + 30) & (y > m - 30) & (y < 300 - m + 30)
    assert rate[inner].sum() * 0.995 <= box <= rate[outer].sum() * 1.005
    h = 12
    done = 0
    kinds = np.char.decode(np.asarray(src["kind"]).astype("S"))
    for s, kind in zip(src, kinds):
        x0, y0 = int(round(s["x"])), int(round(s["y"]))
        if kind != "star" or not (h <= x0 < 320 - h and h <= y0 < 300 - h):
            continue
        if np.sort(np.hypot(src["x"] - s["x"], src["y"] - s["y"]))[1] < 30:
            continue
        cut = model[y0 - h:y0 + h + 1, x0 - h:x0 + h + 1]
        yy, xx = np.mgrid[-h:h + 1, -h:h + 1]
        assert_allclose((cut * xx).sum() / cut.sum() + x0, s["x"], atol=0.05)
        assert_allclose((cut * yy).sum() / cut.sum() + y0, s["y"], atol=0.05)
        done += 1
    assert done >= 1


def test_missing_zeropoint_is_refused(tmp_path):
    """An image without ZP_AB and no --zeropoint gets one clear message, nothing written."""
    _user_image(tmp_path / "nozp.fits", with_zp=False)
    sc = make_scenario("population=uniform")
    with pytest.raises(CatalogError, match="ZP_AB"):
        inject_into_image(tmp_path / "nozp.fits", sc, "b23", tmp_path / "o")
    assert not (tmp_path / "o").exists()


def _digests(folder):
    import hashlib

    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_second_identical_injection_into_one_folder_gives_the_same_files(tmp_path):
    """Running the same injection twice into one folder (report on, so bands.ecsv is read
    back) succeeds, leaves COMPLETE, and every file is byte-identical."""
    _user_image(tmp_path / "user.fits")
    _psf_file(tmp_path / "psf.fits")
    sc = make_scenario("population=uniform", "population.uniform_mag_min=21",
                       "population.uniform_mag_max=27", "population.uniform_density_arcmin2=150",
                       "population.star_density_arcmin2=0", "population.clumpy=false",
                       "score.mag_min=20", "score.mag_max=28")
    out = tmp_path / "out"
    first = inject_into_image(tmp_path / "user.fits", sc, "b23", out, tmp_path / "psf.fits")
    d1 = _digests(out)
    second = inject_into_image(tmp_path / "user.fits", sc, "b23", out, tmp_path / "psf.fits")
    assert (out / "COMPLETE").is_file() and (out / "score" / "b23" / "report.html").is_file()
    assert _digests(out) == d1
    assert json.dumps(first, sort_keys=True) == json.dumps(second, sort_keys=True)
    top = json.loads((out / "summary.json").read_text())
    assert top["detections"] == {"b23": first["n_new_detections"]}
    assert top["n_injected"] == first["n_injected"]


def test_scoring_an_injection_folder_reproduces_its_own_score(injected, capsys):
    """simfield-score on an injection folder finds its band, uses its score settings, and
    writes the same tables as the injection's own scoring (into its own folder)."""
    from simfield.score.run import score_main_args

    out, _ = injected
    rc = score_main_args([str(out), "--no-report"])
    msg = capsys.readouterr().out.strip().splitlines()[-1]
    assert rc == 0 and msg.startswith("simfield-score: band b23 (the run's detection band)")
    mine, own = out / "score_detections_b23" / "b23", out / "score" / "b23"
    names = sorted(p.name for p in own.glob("*.ecsv"))
    assert names == sorted(p.name for p in mine.glob("*.ecsv")) and len(names) >= 8
    for n in names:
        assert (mine / n).read_bytes() == (own / n).read_bytes(), n


def test_scoring_an_incomplete_injection_folder_is_refused_in_one_line(injected, tmp_path,
                                                                      capsys):
    """A folder without truth.fits is refused with one line, exit 2, nothing written."""
    import shutil

    from simfield.score.run import score_main_args

    out, _ = injected
    bad = tmp_path / "bad"
    shutil.copytree(out, bad, ignore=shutil.ignore_patterns("truth.fits", "score*"))
    rc = score_main_args([str(bad)])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "lacks truth.fits" in err[0]
    assert not any(p.name.startswith("score") for p in bad.iterdir())
