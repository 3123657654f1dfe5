"""High-redshift selection: cuts, presets against the template tracks, volumes, counts,
contamination classes, outputs and refusals (simfield.selection)."""

import json
from pathlib import Path

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from astropy.io import fits
from astropy.table import Table
from numpy.testing import assert_allclose
from scipy import stats

from simfield.bands import make_band
from simfield.config import ConditionConfig, SampleConfig, SelectionConfig, _validate_selection
from simfield.errors import CatalogError, ConfigError
from simfield.grid import Grid
from simfield.population.seds import (band_magnitudes, galaxy_fnu, uv_slope_relation,
                                      wave_grid)
from simfield.score.run import score_main_args
from simfield.selection import apply_sample, apply_samples, score_run_selection
from simfield.selection.score import classify_selected
from simfield.selection.volume import poisson_summary, selection_volume, source_plane_area

from conftest import make_scenario

BANDS5 = ["b10", "b13", "b17", "b23", "b36"]


def _phot(**cols):
    return Table({k: np.asarray(v, float) for k, v in cols.items()})


# ------------------------------------------------------------------------------ cuts
def test_colour_cut_with_upper_limits_on_a_hand_made_table():
    """m_a - m_b with band a's flux replaced by its 1-sigma limit below S/N 1 (common
    practice); AB m = 31.4 - 2.5 log10(f/nJy) (Oke & Gunn 1983, ApJ 266, 713)."""
    t = _phot(flux_b10=[10.0, -5.0, 3.0, 10.0], flux_err_b10=[1.0, 10.0, 10.0, 1.0],
              flux_b13=[25.1188643, 100.0, 20.0, -4.0], flux_err_b13=[1.0] * 4)
    # by hand: row 0 detected, 2.5 log10(25.1189/10) = 1.000; row 1 limit 10 nJy ->
    # 2.5 log10(100/10) = 2.500; row 2 limit 10 -> 2.5 log10(20/10) = 0.753; row 3 b13 <= 0
    c = ConditionConfig(kind="colour", bands=["b10", "b13"], above=0.9, limit_sigma=1.0)
    s = SampleConfig(name="t", z_min=7, z_max=9, conditions=[c])
    sel, first = apply_sample(t, s)
    assert sel.tolist() == [True, True, False, False]
    assert first.tolist() == [-1, -1, 0, 0]
    c.above, c.below = 0.7, 1.2  # 1.000 and 0.753 pass; 2.500 (a lower limit) fails
    assert apply_sample(t, s)[0].tolist() == [True, False, True, False]
    c.limit_sigma = 2.0  # row 1 limit 20 nJy -> 2.5 log10(100/20) = 1.747; row 2: 20 -> 0.0
    c.above, c.below = 1.7, 1.8
    assert apply_sample(t, s)[0].tolist() == [False, True, False, False]


def test_snr_slope_and_exclude_conditions():
    """S/N = f / sigma per band; slope term m_a - m_b > v + s (m_c - m_d); exclusion of another
    sample's rows (hand-made values)."""
    t = _phot(flux_b10=[1.0, 30.0], flux_err_b10=[1.0, 1.0],
              flux_b13=[100.0, 100.0], flux_err_b13=[10.0, 10.0],
              flux_b17=[100.0, 50.0], flux_err_b17=[10.0, 10.0])
    nd = ConditionConfig(kind="snr", bands=["b10"], below=2.0)
    det = ConditionConfig(kind="snr", bands=["b13", "b17"], above=4.5)
    assert apply_sample(t, SampleConfig("a", 7, 9, [nd]))[0].tolist() == [True, False]
    assert apply_sample(t, SampleConfig("a", 7, 9, [det]))[0].tolist() == [True, True]
    # row 0: b10-b13 = 5.0, b13-b17 = 0; row 1: 1.307, -0.753 -> threshold 1 + 2 (-0.753)
    sl = ConditionConfig(kind="colour", bands=["b10", "b13"], above=1.0, slope=2.0,
                         slope_bands=["b13", "b17"])
    assert apply_sample(t, SampleConfig("a", 7, 9, [sl]))[0].tolist() == [True, True]
    a = SampleConfig("a", 7, 9, [nd])
    b = SampleConfig("b", 6, 7, [det, ConditionConfig(kind="exclude", sample="a")])
    res = apply_samples(t, [b, a])
    assert res["a"][0].tolist() == [True, False]
    assert res["b"][0].tolist() == [False, True]
    assert res["b"][1].tolist() == [1, -1]


# ------------------------------------------------------------------------------ presets
def _lantern_bands():
    sc = make_scenario()
    return sc, [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
                for b in sc.telescope.bands]


def _tracks(bands, z, family):
    """Template magnitudes computed here from the seds functions: star-forming at M_UV = -20
    (Bouwens et al. 2014 slope relation [mem], break 1.25) and evolved (beta 1, break 1.9;
    red end beta 2, break 2.6), Madau 1995 IGM."""
    z = np.asarray(z, float)
    if family == "starforming":
        beta = uv_slope_relation(z, np.full(z.size, -20.0))
        pars = beta, np.full(z.size, 1.25), np.clip(beta + 0.8, -2.2, 0.5)
    elif family == "evolved":
        pars = np.full(z.size, 1.0), np.full(z.size, 1.9), np.full(z.size, -0.7)
    else:
        pars = np.full(z.size, 2.0), np.full(z.size, 2.6), np.full(z.size, -0.3)
    w = wave_grid(bands)
    return band_magnitudes(w, galaxy_fnu(w, z, np.full(z.size, -20.0), *pars), bands)


def _noise_free_table(mags, names, ref_band, snr=10.0):
    """Fluxes of the track (nJy, AB zero point 31.4), with one error per row giving S/N
    ``snr`` in ``ref_band`` (the band just red of the break): a faint candidate of the kind
    the presets are for."""
    f = np.where(np.isfinite(mags), 10 ** (-0.4 * (mags - 31.4)), 0.0)
    err = f[:, names.index(ref_band)] / snr
    t = Table()
    for i, b in enumerate(names):
        t[f"flux_{b}"], t[f"flux_err_{b}"] = f[:, i], err
    return t


@pytest.mark.parametrize("name,low_z_max", [("z6", 4.4), ("z7", 6.0), ("z8", 7.0),
                                            ("z10", 8.5), ("z13", 11.0)])
def test_presets_select_their_window_and_reject_low_z_tracks(name, low_z_max):
    """Noise-free template colours at S/N 10 in the band red of the break (the first S/N
    floor's last band): every track point inside the
    window's interior is selected, every low-z track point (all three families) is not. The z6
    sample cannot reject star-forming z 4.5-5.4 (no dropout in these bands; see the yaml)."""
    sc, bands = _lantern_bands()
    names = [b.name for b in bands]
    samples = sc.selection.samples
    s = next(p for p in samples if p.name == name)
    ref = next(c.bands[-1] for c in s.conditions if c.kind == "snr" and c.above is not None)
    zin = np.arange(s.z_min + 0.1, s.z_max - 0.1 + 1e-9, 0.05)
    res = apply_samples(_noise_free_table(_tracks(bands, zin, "starforming"), names, ref),
                        samples)
    assert res[name][0].all(), zin[~res[name][0]]
    zlo = np.arange(0.1, low_z_max + 1e-9, 0.05)
    for fam in ("starforming", "evolved", "evolved_red"):
        res = apply_samples(_noise_free_table(_tracks(bands, zlo, fam), names, ref), samples)
        assert not res[name][0].any(), (fam, zlo[res[name][0]])


def test_tracks_printout_has_rest_frame_colours_at_z0_and_no_warnings(capsys):
    """``python -m simfield.selection.tracks`` (README): no RuntimeWarning, and its z = 0.00
    rows are the rest-frame colours, the limit of the templates computed here with their
    distance (astropy's distance modulus) at z = 1e-4 (printed to 0.01 mag)."""
    import warnings

    from simfield.selection import tracks

    _, bands = _lantern_bands()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        tracks._main()
    rows = {}
    for line in capsys.readouterr().out.splitlines():
        if line.startswith("#"):
            fam = line[2:].split(":")[0]
        elif line.split()[0] == "0.00":
            rows[fam] = np.array(line.split()[1:], float)
    assert set(rows) == {"starforming", "evolved", "evolved_red"}
    for fam, got in rows.items():
        m = _tracks(bands, [1e-4], fam)[0]
        assert_allclose(got, m[:-1] - m[1:], atol=0.006, err_msg=fam)
    with pytest.raises(ValueError, match="'z' must be > 0"):
        tracks.band_tracks(bands, [0.0, 1.0], "starforming")


# ------------------------------------------------------------------------------ volumes, counts
def test_veff_of_a_step_function_is_the_comoving_volume_of_the_step():
    """S = 1 for z in [6.5, 8], 0 elsewhere: V_eff = [V_c(8) - V_c(6.5)] Omega / 4 pi
    (Hogg 1999, astro-ph/9905116, eq. 29; astropy.cosmology FlatLambdaCDM(70, 0.3))."""
    ze = np.arange(0.0, 15.01, 0.25)
    me = np.array([-22.0, -21.0, -20.0])
    zc = 0.5 * (ze[:-1] + ze[1:])
    frac = np.tile(((zc > 6.5) & (zc < 8.0)).astype(float), (2, 1))
    area = 3600.0  # arcsec^2
    t = selection_volume(frac, me, ze, area, (6.5, 8.0))
    ref = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725)
    omega_sr = area / (180.0 / np.pi * 3600.0) ** 2
    want = (ref.comoving_volume(8.0) - ref.comoving_volume(6.5)).value * omega_sr / (4 * np.pi)
    assert_allclose(t["v_eff_mpc3"], want, rtol=1e-10)  # same integral, exact bin edges
    assert_allclose(t["v_eff_window_mpc3"], want, rtol=1e-10)


def test_source_plane_area_behind_a_lens():
    """dOmega_source = dOmega_image / |mu| (Schneider, Ehlers & Falco 1992): every image at
    |mu| = 4, one per source, gives a quarter of the image area; pairs of images (two per
    source, |mu| 2 each) the same."""
    assert_allclose(source_plane_area(100.0, np.full(50, 4.0), 50), 25.0)
    assert_allclose(source_plane_area(100.0, np.full(100, 2.0), 50), 25.0)
    assert_allclose(source_plane_area(100.0, np.ones(30), 30), 100.0)


@pytest.mark.parametrize("n,mu", [(0, 0.3), (3, 2.5), (12, 4.1)])
def test_poisson_probabilities(n, mu):
    """Against scipy.stats.poisson and the closed form P(0) = exp(-mu) (Poisson 1837)."""
    p = poisson_summary(n, mu)
    assert_allclose(p["p_equal"], stats.poisson.pmf(n, mu), rtol=1e-12)
    assert_allclose(p["p_at_most"], stats.poisson.cdf(n, mu), rtol=1e-12)
    assert_allclose(p["p_at_least"], 1.0 - stats.poisson.cdf(n - 1, mu), rtol=1e-12)
    assert_allclose(p["p_zero"], np.exp(-mu), rtol=1e-12)


# ------------------------------------------------------------------------------ contamination
def test_classify_selected_by_truth_kind_and_window():
    """Hand-labelled rows: kinds and redshifts against the window [6.5, 7.5]."""
    kind = ["galaxy", "galaxy", "galaxy", "dusty", "dusty", "star", "dwarf", "member", "", ""]
    z = [7.0, 2.0, 9.0, 7.2, 2.5, 0.0, 0.0, 0.3, np.nan, np.nan]
    cause = [""] * 8 + ["noise", "spike"]
    assert classify_selected(kind, z, cause, (6.5, 7.5)).tolist() == [
        "in_window", "lowz_galaxy", "higher_z_galaxy", "in_window", "dusty", "star", "dwarf",
        "member", "noise", "spike"]


BAND = "b17"


def _make_run(path, sc):
    """Tiny run: mosaic header and flags, truth of six sources, photometry of seven
    detections (hand-placed: five matched, one noise peak, one between two truth images)."""
    g = Grid(nx=200, ny=200, scale=0.05, ra0=150.0, dec0=2.0)
    hdr = g.wcs.to_header()
    hdr["ZP_AB"] = 28.0
    flags = np.zeros((200, 200), np.int16)
    flags[10:13, 10:13] = 4
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(np.zeros((200, 200), np.float32), hdr,
                                                   "IMAGE"),
                  fits.ImageHDU(flags, hdr, "FLAGS")]).writeto(path / f"mosaic_{BAND}.fits")
    #            in-window, low-z, star, dusty, member, pair a, pair b
    x = np.array([50.0, 100.0, 150.0, 50.0, 100.0, 150.0, 162.0])
    y = np.array([50.0, 50.0, 50.0, 150.0, 150.0, 150.0, 150.0])
    kind = ["galaxy", "galaxy", "star", "dusty", "member", "galaxy", "galaxy"]
    z = [7.0, 1.8, 0.0, 2.4, 0.3, 3.0, 3.0]
    n = x.size
    ra, dec = g.pixel_to_sky(x, y)
    src = Table({"id": np.arange(1, n + 1), "kind": kind, "ra": ra, "dec": dec, "x": x,
                 "y": y, "redshift": z, "abs_mag_uv": [-20.5] * n, f"mag_{BAND}": [27.0] * n,
                 "magnification": np.ones(n)})
    ims = Table({"image_id": src["id"], "source_id": src["id"], "ra": ra, "dec": dec, "x": x,
                 "y": y, "magnification": np.ones(n), f"mag_{BAND}": [27.0] * n})
    fits.HDUList([fits.PrimaryHDU(), fits.table_to_hdu(src), fits.table_to_hdu(ims)]) \
        .writeto(path / "truth.fits")
    with fits.open(path / "truth.fits", mode="update") as hl:
        hl[1].name, hl[2].name = "SOURCES", "IMAGES"
    dx = np.concatenate([x[:5] + 0.5, [20.0, 156.0, 11.0]])  # + noise, blend, artefact
    dy = np.concatenate([y[:5], [180.0, 150.0, 11.0]])
    dra, ddec = g.pixel_to_sky(dx, dy)
    ph = Table({"id": np.arange(1, dx.size + 1), "ra": dra, "dec": ddec, "x": dx, "y": dy})
    for b in sc.band_names:
        ph[f"flux_{b}"] = np.full(dx.size, 100.0)
        ph[f"flux_err_{b}"] = np.full(dx.size, 1.0)
        ph[f"flags_{b}"] = np.zeros(dx.size, np.int16)
    ph.meta["DETBAND"] = BAND
    hdu = fits.table_to_hdu(ph)
    hdu.name = "PHOTOMETRY"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path / "photometry.fits")
    (path / "COMPLETE").write_text("a finished run\n")  # as simfield leaves one
    return dx.size


def _select_everything(sc):
    sc.selection.samples = [SampleConfig(
        "all", 6.5, 7.5, [ConditionConfig(kind="snr", bands=["b17"], above=5.0)])]
    sc.selection.report = True
    return sc


def test_contamination_classes_and_outputs_of_a_synthetic_run(tmp_path):
    """Every detection selected: classes by hand from the layout (one per class), S = 1 in the
    in-window galaxy's cell, tables with units, a report; the blend and noise rules are those
    of score.metrics (two truth images within 0.5" of an unmatched detection: blend)."""
    sc = _select_everything(make_scenario())
    n_det = _make_run(tmp_path, sc)
    res = score_run_selection(tmp_path, sc)["all"]
    assert res["n_selected"] == n_det
    want = {"in_window": 1, "lowz_galaxy": 1, "star": 1, "dusty": 1, "member": 1, "noise": 1,
            "blend": 1, "artefact": 1}
    assert {k: v for k, v in res["contamination"].items() if v} == want
    out = tmp_path / "selection" / "all"
    cont = Table.read(out / "contamination.ecsv")
    assert_allclose(cont["fraction"][cont["class"] == "in_window"], 1 / n_det)
    assert np.all((cont["fraction_lo"] <= cont["fraction"]) &
                  (cont["fraction"] <= cont["fraction_hi"]))
    comp = Table.read(out / "completeness.ecsv")
    cell = (comp["z_lo"] <= 7.0) & (comp["z_hi"] > 7.0) & (comp["abs_mag_uv_lo"] == -21.0)
    assert comp["n"][cell][0] == 1 and comp["k"][cell][0] == 1
    vol = Table.read(out / "effective_volume.ecsv")
    assert str(vol["v_eff_mpc3"].unit) == "Mpc3"
    assert res["counts_window"]["n_observed"] == 1
    assert (out / "report.html").is_file()
    assert not (out / "colour_colour.png").exists()  # no colour conditions: no diagram
    assert json.loads((out / "summary.json").read_text())["sample"] == "all"


# ------------------------------------------------------------------------------ refusals
def test_selection_group_composes_and_refuses_an_unknown_band_override():
    """The default config composes the five presets; an override naming an unknown band is
    refused naming the key (Hydra compose, as the command line does)."""
    sc = make_scenario()
    assert [s.name for s in sc.selection.samples] == ["z6", "z7", "z8", "z10", "z13"]
    with pytest.raises(ConfigError, match=r"selection\.samples\.2\.conditions\.0\.bands\.0"):
        make_scenario("selection.samples.2.conditions.0.bands=[b99]")


@pytest.mark.parametrize("cond,key", [
    (dict(kind="colour", bands=["b10", "b99"], above=1.0), "conditions.0.bands.1"),
    (dict(kind="snr", bands=["b13"]), "conditions.0.above"),
    (dict(kind="exclude", sample="z99"), "conditions.0.sample"),
    (dict(kind="photoz", z_cut=6.5, above=1.5), "conditions.0.above"),
    (dict(kind="hue", bands=["b10"], above=1.0), "conditions.0.kind"),
])
def test_bad_conditions_are_refused_in_one_line(cond, key):
    """A condition naming an unknown band, sample or kind, or without a bound, is refused
    naming its key."""
    s = SampleConfig("x", 7, 8, [ConditionConfig(**cond)])
    with pytest.raises(ConfigError, match=f"selection.samples.0.{key}") as e:
        _validate_selection(SelectionConfig(samples=[s]), BANDS5)
    assert "\n" not in str(e.value)


def test_photoz_condition_without_photoz_and_missing_flux_are_refused(tmp_path):
    """No photoz.fits for a P(z) condition, or a flux column a sample needs missing: one line,
    nothing written."""
    sc = _select_everything(make_scenario())
    _make_run(tmp_path, sc)
    sc.selection.samples[0].conditions.append(ConditionConfig(kind="photoz", z_cut=6.5,
                                                              above=0.8))
    with pytest.raises(CatalogError, match="needs photoz.fits"):
        score_run_selection(tmp_path, sc)
    sc.selection.samples[0].conditions = [ConditionConfig(kind="snr", bands=["b36"], above=3)]
    t = Table.read(tmp_path / "photometry.fits", hdu="PHOTOMETRY")
    t.remove_column("flux_err_b36")
    hdu = fits.table_to_hdu(t)
    hdu.name = "PHOTOMETRY"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp_path / "photometry.fits", overwrite=True)
    with pytest.raises(CatalogError, match="lacks column 'flux_err_b36' needed by sample 'all'"):
        score_run_selection(tmp_path, sc)
    assert not (tmp_path / "selection").exists()


def test_cli_select_col_refuses_a_missing_column(tmp_path, capsys):
    """simfield-score --select-col with a column the catalogue lacks: exit 2, one line."""
    sc = _select_everything(make_scenario())
    _make_run(tmp_path, sc)
    from simfield.config import to_yaml
    (tmp_path / "scenario.yaml").write_text(to_yaml(sc))
    cat = Table.read(tmp_path / "photometry.fits", hdu="PHOTOMETRY")
    cat.write(tmp_path / "mine.ecsv")
    rc = score_main_args([str(tmp_path), "--catalog", str(tmp_path / "mine.ecsv"), "--band",
                          BAND, "--select-col", "is_highz"])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and "lacks column 'is_highz'" in err and "\n" not in err
    assert not (tmp_path / "selection_mine").exists()
    cat["is_highz"] = np.arange(len(cat)) == 0
    cat.write(tmp_path / "mine.ecsv", overwrite=True)
    rc = score_main_args([str(tmp_path), "--catalog", str(tmp_path / "mine.ecsv"), "--band",
                          BAND, "--select-col", "is_highz", "--no-report"])
    assert rc == 0
    s = json.loads((tmp_path / "selection_mine" / "all" / "summary.json").read_text())
    assert s["n_selected"] == 1 and s["contamination"]["in_window"] == 1


def test_cli_zphot_col_selects_inside_the_window(tmp_path, capsys):
    """--zphot-col: selected where the catalogue's redshift lies in the sample's window
    (hand-made redshifts: one of eight detections at z 7.1, inside [6.5, 7.5])."""
    sc = _select_everything(make_scenario())
    _make_run(tmp_path, sc)
    from simfield.config import to_yaml
    (tmp_path / "scenario.yaml").write_text(to_yaml(sc))
    cat = Table.read(tmp_path / "photometry.fits", hdu="PHOTOMETRY")
    cat["zp"] = [7.1, 1.5, 0.1, 2.0, 0.3, 9.0, 3.0, 5.0]
    cat.write(tmp_path / "zcat.fits")
    rc = score_main_args([str(tmp_path), "--catalog", str(tmp_path / "zcat.fits"), "--band",
                          BAND, "--zphot-col", "zp", "--sample", "all", "--no-report"])
    assert rc == 0, capsys.readouterr().err
    s = json.loads((tmp_path / "selection_zcat" / "all" / "summary.json").read_text())
    assert s["n_selected"] == 1 and s["contamination"]["in_window"] == 1
    rc = score_main_args([str(tmp_path), "--catalog", str(tmp_path / "zcat.fits"), "--band",
                          BAND, "--zphot-col", "zp", "--sample", "z99"])
    assert rc == 2 and "--sample: 'z99' is not a sample" in capsys.readouterr().err


def _flag_only_catalogue(tmp_path, sc, name="mine.fits"):
    """The tiny run with its scenario, and a catalogue of positions, magnitudes, a selection
    flag and redshifts only (no flux_<b> columns), upper-case names: row 0 is the in-window
    galaxy (hand-placed in _make_run), flagged and at z 7.1."""
    _make_run(tmp_path, sc)
    from simfield.config import to_yaml
    (tmp_path / "scenario.yaml").write_text(to_yaml(sc))
    ph = Table.read(tmp_path / "photometry.fits", hdu="PHOTOMETRY")
    n = len(ph)
    Table({"RA": ph["ra"], "DEC": ph["dec"], "MAG": np.full(n, 27.0),
           "IS_Z8": np.arange(n) == 0, "ZPHOT": np.r_[7.1, np.full(n - 1, 2.0)]}) \
        .write(tmp_path / name)
    return tmp_path / name


def test_cli_selection_of_a_flag_only_catalogue_is_scored_without_its_colours(tmp_path,
                                                                               capsys):
    """README's command: a catalogue with a flag (or redshifts) and positions but no fluxes is
    scored for a sample with colour conditions (the z7 preset); the report leaves out the
    colour-colour diagram and says which columns it lacks. Expected counts by hand from the
    layout: one selected, the in-window galaxy (z 7.0 in [6.5, 7.5] of the z7 window)."""
    sc = make_scenario()
    sc.selection.report = True
    cat = _flag_only_catalogue(tmp_path, sc)
    z7 = next(s for s in sc.selection.samples if s.name == "z7")
    assert z7.z_min <= 7.0 <= z7.z_max and any(c.kind == "colour" for c in z7.conditions)
    for opt in (["--select-col", "IS_Z8"], ["--zphot-col", "ZPHOT"]):
        rc = score_main_args([str(tmp_path), "--catalog", str(cat), "--band", BAND, *opt,
                              "--sample", "z7", "--ra-col", "RA", "--dec-col", "DEC",
                              "--mag-col", "MAG"])
        assert rc == 0, capsys.readouterr().err
        out = tmp_path / "selection_mine" / "z7"
        s = json.loads((out / "summary.json").read_text())
        assert s["n_selected"] == 1 and s["contamination"]["in_window"] == 1
        page = (out / "report.html").read_text()
        assert "not drawn: the catalogue has no flux_b10, flux_b13, flux_b17 (nJy)" in page
        assert not (out / "colour_colour.png").exists()
        assert sorted(p.name for p in (tmp_path / "selection_mine").iterdir()) == ["z7"]


def test_cli_selection_finds_ra_dec_as_plain_scoring_does(tmp_path, capsys):
    """Without --ra-col/--dec-col the selection finds RA and DEC as plain scoring does
    (simfield.score.catalog.resolve_columns: the name as given, else ignoring case); a
    catalogue with neither is refused in one line naming the role and the available columns,
    nothing written."""
    sc = _select_everything(make_scenario())
    sc.selection.report = False
    cat = _flag_only_catalogue(tmp_path, sc)
    rc = score_main_args([str(tmp_path), "--catalog", str(cat), "--band", BAND,
                          "--select-col", "IS_Z8"])
    assert rc == 0, capsys.readouterr().err
    s = json.loads((tmp_path / "selection_mine" / "all" / "summary.json").read_text())
    assert s["n_selected"] == 1 and s["contamination"]["in_window"] == 1
    t = Table.read(cat)
    t.rename_column("RA", "alpha")
    t.write(tmp_path / "nora.fits")
    capsys.readouterr()
    rc = score_main_args([str(tmp_path), "--catalog", str(tmp_path / "nora.fits"), "--band",
                          BAND, "--select-col", "IS_Z8"])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and "\n" not in err
    assert "lacks column(s) ra='ra'; available: alpha, DEC, MAG, IS_Z8, ZPHOT" in err
    assert not (tmp_path / "selection_nora").exists()


def test_failed_catalogue_selection_leaves_no_partial_folder(tmp_path, monkeypatch):
    """A failure after the first sample's files were written (the report of the second,
    made to fail here) removes the folder the command created."""
    from simfield.selection import report, run

    sc = make_scenario()
    sc.selection.report = True
    cat = _flag_only_catalogue(tmp_path, sc)
    calls = []

    def fail_second(*args, **kw):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("disk full")
        return Path(args[0]) / "report.html"

    monkeypatch.setattr(report, "make_report", fail_second)
    with pytest.raises(RuntimeError, match="disk full"):
        run.score_catalogue_selection(tmp_path, cat, sc, BAND, "IS_Z8", samples=["z6", "z7"])
    assert len(calls) == 2 and not (tmp_path / "selection_mine").exists()


def test_photoz_condition_refused_up_front_without_its_cut_or_photoz():
    """A P(z > c) condition needs photoz enabled and c among photoz.z_cuts (the columns
    photoz.fits will hold): refused when the scenario is validated, naming the key."""
    sc = make_scenario()
    cond = ConditionConfig(kind="photoz", z_cut=7.0, above=0.8)
    sc.selection.samples[0].conditions.append(cond)
    from simfield.config import validate
    with pytest.raises(ConfigError, match=r"conditions\.5\.z_cut=7\.0 must be one of photoz"):
        validate(sc)
    cond.z_cut = sc.photoz.z_cuts[1]
    validate(sc)
    sc.photoz.enabled = False
    with pytest.raises(ConfigError, match=r"conditions\.5\.kind='photoz' needs photometric"):
        validate(sc)
