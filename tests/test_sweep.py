"""Sweeps: per-job seeds, resume decisions, collecting a sweep directory, and real multiruns.

The end-to-end multiruns need the whole pipeline; they are skipped (with the reason) only while
``simfield.pipeline.run_scenario`` still raises ImportError.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from astropy.table import Table
from numpy.testing import assert_allclose

from simfield import sweep
from simfield.io import COMPLETE_MARKER
from tests.conftest import make_scenario, shared_psf_cache

ROOT = Path(__file__).resolve().parent.parent

# A field small enough for a few jobs in seconds: one band, 8 arcsec, small PSFs (each job's
# seed is its own, and so is its PSF), no detection (these tests check seeds, mosaics, depths,
# completeness markers and collection, not the catalogues).
TINY = [
    "survey=quick", "survey.width_arcsec=8", "survey.height_arcsec=8",
    "telescope.bands=[{name:b17,center_nm:1700,width_nm:380,throughput:0.4,sky_mjy_sr:0.18}]",
    "selection=none", "detection.enabled=false",
    "telescope.psf.n_wavelengths=3", "telescope.psf.spike_radius_arcsec=2.0",
    "telescope.psf.core_radius_arcsec=1.0", "score.report=false",
    "telescope.field_psf.enabled=false", "telescope.drift.enabled=false",
]


# --------------------------------------------------------------------------------------------
# seeds
# --------------------------------------------------------------------------------------------
def test_job_seed_matches_sha256_rule():
    """job_seed is SHA-256 of 'seed=<base>' and the sorted overrides, first 8 bytes mod 2**31."""
    text = "seed=7\ndetector.read_noise_e=5\nsurvey=quick"
    expect = int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "big") % 2**31
    assert sweep.job_seed(7, ["survey=quick", "detector.read_noise_e=5"]) == expect


def test_job_seed_order_independent_and_ignores_hydra_and_seed():
    """Override order, hydra.* / hydra/ overrides, execution-only keys (workers) and the seed
    override do not change it."""
    a = sweep.job_seed(3, ["survey=quick", "detector.read_noise_e=5", "seed=3"])
    b = sweep.job_seed(3, ["hydra/launcher=joblib", "detector.read_noise_e=5",
                           "hydra.sweep.dir=/x", "survey=quick", "workers=1"])
    assert a == b


def test_job_seed_canonical_spelling():
    """Spelling of the same value (1e1 / 10.0, list spacing) does not change the seed."""
    a = sweep.job_seed(1, ["telescope.psf.jitter_mas=1e1", "score.z_bins=[0, 1, 2]"])
    b = sweep.job_seed(1, ["telescope.psf.jitter_mas=10.0", "score.z_bins=[0,1,2]"])
    assert a == b


def test_job_seed_differs_between_jobs_and_base_seeds():
    """Different values, keys or base seeds give different seeds, all in [0, 2**31)."""
    seeds = {sweep.job_seed(s, [f"detector.read_noise_e={r}"])
             for s in range(5) for r in (3, 6, 12, 24)}
    assert len(seeds) == 20
    assert all(0 <= s < 2**31 for s in seeds)


def test_job_seed_refuses_negative_base():
    """A negative or non-integer base seed is refused, naming it."""
    with pytest.raises(ValueError, match="base_seed"):
        sweep.job_seed(-1, [])
    with pytest.raises(ValueError, match="base_seed"):
        sweep.job_seed(1.5, [])


def test_rerun_command_single_run_with_effective_seed():
    """The re-run line forces a single run, carries the effective seed, drops hydra.*."""
    cmd = sweep.rerun_command(12345, ["+experiment=lens_on_off", "lens=cluster", "seed=2",
                                      "hydra.sweep.dir=/tmp/s"])
    assert cmd == "simfield hydra.mode=RUN seed=12345 +experiment=lens_on_off lens=cluster"


def test_plan_job_single_run_keeps_seed(tmp_path):
    """Outside a multirun the configured seed is used as given and nothing is skipped."""
    sc = make_scenario("survey=quick", "seed=5")
    plan = sweep.plan_job(sc, ["survey=quick", "seed=5"], tmp_path, multirun=False)
    assert plan.scenario.seed == 5 and not plan.skip


def test_plan_job_multirun_derives_seed_and_records_it(tmp_path):
    """In a multirun the job seed is derived; job.json records it and the re-run line."""
    ov = ["survey=quick", "seed=5", "detector.read_noise_e=6"]
    sc = make_scenario(*ov)
    plan = sweep.plan_job(sc, ov, tmp_path, multirun=True)
    assert plan.scenario.seed == sweep.job_seed(5, ov) and plan.base_seed == 5
    rec = json.loads(sweep.write_job_record(tmp_path, plan).read_text())
    assert rec["seed"] == plan.scenario.seed and rec["base_seed"] == 5
    assert f"seed={plan.scenario.seed}" in rec["rerun"]


# --------------------------------------------------------------------------------------------
# resume
# --------------------------------------------------------------------------------------------
def _marker(d: Path, config="abc123", files=()):
    d.mkdir(parents=True, exist_ok=True)
    (d / COMPLETE_MARKER).write_text(f"simfield 0.1.0 seed 9 config {config}\n"
                                     + "".join(f"{f}\n" for f in files))


def test_is_complete_needs_marker_and_listed_files(tmp_path):
    """A run is complete only with the marker and every file the marker lists."""
    assert not sweep.is_complete(tmp_path / "missing")
    assert not sweep.is_complete(tmp_path)
    _marker(tmp_path, files=["mosaic_b17.fits"])
    assert not sweep.is_complete(tmp_path)
    (tmp_path / "mosaic_b17.fits").write_bytes(b"x")
    assert sweep.is_complete(tmp_path)
    assert sweep.read_marker(tmp_path)["seed"] == 9


def test_should_skip_only_complete_runs_of_the_same_config(tmp_path):
    """Skip a complete run; redo an interrupted one or one of another configuration."""
    assert not sweep.should_skip(tmp_path)
    (tmp_path / "truth.fits").write_bytes(b"partial")
    assert not sweep.should_skip(tmp_path, "abc123")
    _marker(tmp_path, config="abc123")
    assert sweep.should_skip(tmp_path)
    assert sweep.should_skip(tmp_path, "abc123")
    assert not sweep.should_skip(tmp_path, "ffff0000")


def test_remove_partial_files_keeps_final_files(tmp_path):
    """Leftover *.part temporaries of a killed run go; final files stay."""
    (tmp_path / "score").mkdir()
    (tmp_path / ".mosaic_b17.fits.abcd.part").write_bytes(b"x")
    (tmp_path / "score" / ".t.ecsv.1.part").write_bytes(b"x")
    (tmp_path / "mosaic_b17.fits").write_bytes(b"x")
    gone = sweep.remove_partial_files(tmp_path)
    assert len(gone) == 2
    assert [p.name for p in tmp_path.rglob("*") if p.is_file()] == ["mosaic_b17.fits"]


# --------------------------------------------------------------------------------------------
# collect on a hand-built sweep directory
# --------------------------------------------------------------------------------------------
def _fake_job(root: Path, num: int, overrides: list[str], summary: dict | None):
    d = root / str(num)
    (d / ".hydra").mkdir(parents=True)
    (d / ".hydra" / "overrides.yaml").write_text(yaml.safe_dump(overrides))
    if summary is not None:
        (d / "summary.json").write_text(json.dumps(summary))
        _marker(d)
    return d


def _summary(seed, n_exp, depth, m50=None):
    s = {"seed": seed, "n_sources": 100 + n_exp, "simfield_version": "0.1.0",
         "depth_ab": {"b10": {"predicted_5sigma": depth + 0.1, "measured_5sigma": depth},
                      "b17": {"predicted_5sigma": depth + 0.3, "measured_5sigma": depth + 0.2}},
         "provenance": {"seed": seed, "config": "long text"}}
    if m50 is not None:
        s["score"] = {"b17": {"m50": m50, "m90": m50 - 0.5, "purity_at_reference_mag": None,
                              "band": "b17", "n_detections": 40}}
    return s


@pytest.fixture
def fake_sweep(tmp_path):
    root = tmp_path / "sweep"
    for num, n in enumerate((1, 2, 4, 8, 16, 32, 64, 128, 256, 512, 1024)):
        ov = ["survey=quick", f"survey.n_exposures={n}", "hydra.sweep.dir=x"]
        if num == 10:
            _fake_job(root, num, ov, None)  # interrupted: no marker
        else:
            _fake_job(root, num, ov, _summary(1000 + num, n, 28.0 + 1.25 * np.log10(n),
                                              m50=27.0 if num % 2 else None))
    return root


def test_collect_table_from_fake_sweep(fake_sweep):
    """One row per completed job in job-number order, overrides and metrics as columns."""
    t = sweep.collect(fake_sweep)
    assert list(t["job"]) == [str(i) for i in range(10)]  # natural order, job 10 incomplete
    assert t.meta["incomplete_jobs"] == ["10"]
    assert t.meta["swept"] == ["survey.n_exposures"]
    assert "hydra.sweep.dir" not in t.colnames
    assert list(t["survey"]) == ["quick"] * 10
    n = np.array([1, 2, 4, 8, 16, 32, 64, 128, 256, 512])
    assert_allclose(t["survey.n_exposures"], n, rtol=0, atol=0)
    assert_allclose(t["depth_ab.b10.measured_5sigma"], 28.0 + 1.25 * np.log10(n),
                    rtol=0, atol=1e-12)
    assert_allclose(t["job_seed"], 1000 + np.arange(10), rtol=0, atol=0)
    assert str(t["depth_ab.b17.predicted_5sigma"].unit) == "mag"
    assert "provenance.seed" not in t.colnames and "simfield_version" not in t.colnames


def test_collect_masks_missing_keys(fake_sweep):
    """Summary keys absent in some jobs (or null) are masked, not guessed."""
    t = sweep.collect(fake_sweep)
    m50 = t["score.b17.m50"]
    assert list(np.ma.getmaskarray(m50)) == [i % 2 == 0 for i in range(10)]
    assert_allclose(m50[1::2], 27.0, rtol=0, atol=0)
    pur = t["score.b17.purity_at_reference_mag"]  # null in every job
    assert pur.dtype.kind == "f" and np.ma.getmaskarray(pur).all()


def test_collect_include_incomplete(fake_sweep):
    """With include_incomplete the interrupted job gets a row with complete=False."""
    t = sweep.collect(fake_sweep, include_incomplete=True)
    assert len(t) == 11 and not t["complete"][-1]
    assert np.ma.getmaskarray(t["n_sources"])[-1]


def test_collect_main_writes_table_and_plots(fake_sweep, tmp_path, capsys):
    """The command writes sweep.ecsv (readable back) and one PNG per metric and parameter."""
    out = tmp_path / "out"
    assert sweep.collect_main_args([str(fake_sweep), "--out", str(out)]) == 0
    back = Table.read(out / "sweep.ecsv")
    assert len(back) == 10
    pngs = sorted(p.name for p in out.glob("*.png"))
    assert "depth_ab.measured_5sigma_vs_survey.n_exposures.png" in pngs
    assert "score.m50_vs_survey.n_exposures.png" in pngs
    assert all((out / p).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)
    assert "1 incomplete" in capsys.readouterr().err


def test_collect_rerun_column_and_missing_override(tmp_path):
    """The re-run line of job.json becomes a column; a job lacking a swept key is masked in
    that column and the plots are still drawn."""
    root = tmp_path / "s"
    for num, n in enumerate((1, 4)):
        d = _fake_job(root, num, [f"survey.n_exposures={n}"], _summary(num, n, 28.0 + n))
        (d / sweep.JOB_RECORD).write_text(json.dumps({"rerun": f"simfield seed={num}"}))
    _fake_job(root, 2, [], _summary(5, 0, 27.0))
    t = sweep.collect(root)
    assert list(t["rerun"][:2]) == ["simfield seed=0", "simfield seed=1"]
    assert list(np.ma.getmaskarray(t["survey.n_exposures"])) == [False, False, True]
    assert list(np.ma.getmaskarray(t["rerun"])) == [False, False, True]
    files = sweep.plot_sweep(t, tmp_path / "plots")
    assert tmp_path / "plots" / "depth_ab.measured_5sigma_vs_survey.n_exposures.png" in files


def test_collect_main_default_out_and_categorical(tmp_path):
    """A categorical sweep (lens=none,cluster) is plotted; default output SWEEP_DIR/collected."""
    root = tmp_path / "s"
    _fake_job(root, 0, ["lens=none"], _summary(1, 1, 28.0))
    _fake_job(root, 1, ["lens=cluster"], _summary(2, 1, 27.5))
    assert sweep.collect_main_args([str(root)]) == 0
    assert (root / "collected" / "sweep.ecsv").is_file()
    assert (root / "collected" / "n_sources_vs_lens.png").is_file()
    assert sweep.collect(root).meta["swept"] == ["lens"]


@pytest.mark.parametrize("make, msg", [
    (lambda p: p / "nope", "does not exist"),
    (lambda p: (_fake_job(p / "s", 0, ["seed=1"], None), p / "s")[1], "no completed jobs"),
])
def test_collect_main_errors_one_line(tmp_path, capsys, make, msg):
    """Missing directory or no completed job: one 'simfield-collect: error:' line, status 2."""
    assert sweep.collect_main_args([str(make(tmp_path))]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("simfield-collect: error: ") and msg in err[0]


def test_collect_raises_for_missing_dir(tmp_path):
    """collect() itself raises FileNotFoundError naming the directory."""
    with pytest.raises(FileNotFoundError, match="nope"):
        sweep.collect(tmp_path / "nope")


# --------------------------------------------------------------------------------------------
# presets
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name, key, values", [
    ("depth_vs_exposures", "survey.n_exposures", "1,2,4,8"),
    ("completeness_vs_read_noise", "detector.read_noise_e", "3,6,12,24"),
    ("lens_on_off", "lens", "none,cluster"),
])
def test_experiment_presets_compose(name, key, values):
    """Each experiment preset asks for a multirun over its parameter on the quick field."""
    from hydra import compose, initialize_config_dir

    from simfield.config import register_configs

    register_configs()
    with initialize_config_dir(str(ROOT / "conf"), version_base=None):
        cfg = compose("config", overrides=[f"+experiment={name}"], return_hydra_config=True)
    assert str(cfg.hydra.mode) == "RunMode.MULTIRUN"
    assert str(cfg.hydra.sweeper.params[key]) == values
    assert cfg.survey.name == "quick"


@pytest.mark.parametrize("preset, target", [
    ("joblib", "JoblibLauncher"), ("parallel", "JoblibLauncher"),
    ("local", "LocalLauncher"), ("slurm", "SlurmLauncher"),
    ("submitit_local", "LocalLauncher"), ("submitit_slurm", "SlurmLauncher"),
])
def test_launcher_presets_compose(preset, target):
    """Every documented launcher choice composes to the right plugin class."""
    from hydra import compose, initialize_config_dir

    from simfield.config import register_configs

    register_configs()
    with initialize_config_dir(str(ROOT / "conf"), version_base=None):
        cfg = compose("config", overrides=[f"hydra/launcher={preset}"],
                      return_hydra_config=True)
    assert cfg.hydra.launcher._target_.endswith(target)


# --------------------------------------------------------------------------------------------
# end to end (needs the pipeline)
# --------------------------------------------------------------------------------------------
def _multirun(sweep_dir: Path, *extra: str, timeout: float = 240) -> subprocess.CompletedProcess:
    # the session's PSF cache, not the user's: a job of the same seed (the relaunch, the other
    # launcher) finds its PSFs and PSF picture there
    cmd = [sys.executable, "-c", "from simfield.cli import main; main()", "-m", *TINY,
           f"telescope.psf.cache_dir={shared_psf_cache()}", f"hydra.sweep.dir={sweep_dir}",
           *extra]
    return subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, timeout=timeout)


def _sci(path: Path) -> np.ndarray:
    from astropy.io import fits

    with fits.open(path) as hl:
        return np.array(hl["IMAGE"].data)


@pytest.fixture(scope="module")
def basic_sweep(tmp_path_factory):
    """A two-job sweep (seed=1,2) with Hydra's basic launcher; skipped while the pipeline
    raises ImportError."""
    sd = tmp_path_factory.mktemp("basic") / "sw"
    r = _multirun(sd, "seed=1,2")
    if r.returncode != 0 and "ImportError" in r.stderr:
        pytest.skip("pipeline stages not all importable yet: "
                    + r.stderr.strip().splitlines()[-1])
    assert r.returncode == 0, r.stderr[-3000:]
    return sd


def test_multirun_jobs_record_effective_seed(basic_sweep):
    """Each job used job_seed(base, overrides), recorded in job.json and summary.json, and
    its re-run line carries that seed."""
    for num, base in ((0, 1), (1, 2)):
        job = json.loads((basic_sweep / str(num) / sweep.JOB_RECORD).read_text())
        assert job["base_seed"] == base
        assert job["seed"] == sweep.job_seed(base, job["overrides"])
        summ = json.loads((basic_sweep / str(num) / "summary.json").read_text())
        assert summ["seed"] == job["seed"]
        assert f"seed={job['seed']} " in job["rerun"] and "hydra.mode=RUN" in job["rerun"]


def test_collect_real_sweep(basic_sweep):
    """collect gathers both jobs of a real sweep with their depths."""
    t = sweep.collect(basic_sweep)
    assert list(t["job"]) == ["0", "1"] and t.meta["swept"] == ["seed"]
    assert np.isfinite(np.asarray(t["depth_ab.b17.measured_5sigma"], float)).all()


@pytest.mark.slow
def test_relaunch_skips_complete_and_redoes_interrupted(basic_sweep):
    """Relaunching into the same hydra.sweep.dir leaves a complete job untouched and runs an
    interrupted one (marker removed) again, to the same result. The relaunch uses joblib's
    launcher, so the redone job also shows that joblib gives the job the basic launcher gave
    it the same seed and the same mosaic (test_other_launchers_give_the_same_job checks
    submitit's local executor in a sweep dir of its own; one multirun fewer)."""
    mosaic0 = basic_sweep / "0" / "mosaic_b17.fits"
    before0 = mosaic0.stat().st_mtime_ns
    before1 = _sci(basic_sweep / "1" / "mosaic_b17.fits")
    seed1 = json.loads((basic_sweep / "1" / sweep.JOB_RECORD).read_text())["seed"]
    (basic_sweep / "1" / COMPLETE_MARKER).unlink()
    (basic_sweep / "1" / sweep.JOB_RECORD).unlink()  # written again by the joblib job
    (basic_sweep / "1" / ".truth.fits.x1y2.part").write_bytes(b"half")  # a killed write
    # one joblib worker process runs both jobs (the default starts one per core)
    r = _multirun(basic_sweep, "seed=1,2", "hydra/launcher=joblib", "hydra.launcher.n_jobs=1")
    assert r.returncode == 0, r.stderr[-3000:]
    assert mosaic0.stat().st_mtime_ns == before0
    assert sweep.is_complete(basic_sweep / "1")
    assert not list((basic_sweep / "1").glob("*.part"))
    assert json.loads((basic_sweep / "1" / sweep.JOB_RECORD).read_text())["seed"] == seed1
    np.testing.assert_array_equal(_sci(basic_sweep / "1" / "mosaic_b17.fits"), before1)


@pytest.mark.slow
@pytest.mark.parametrize("launcher", ["local"])
def test_other_launchers_give_the_same_job(basic_sweep, tmp_path, launcher):
    """The same job under submitit's local executor gets the same seed and the same mosaic
    as under the basic launcher: seeds do not depend on the launcher or sweep dir (joblib's
    launcher is checked by test_relaunch_skips_complete_and_redoes_interrupted)."""
    sd = tmp_path / launcher
    r = _multirun(sd, "seed=1", f"hydra/launcher={launcher}")
    assert r.returncode == 0, r.stderr[-3000:]
    a = json.loads((basic_sweep / "0" / sweep.JOB_RECORD).read_text())["seed"]
    b = json.loads((sd / "0" / sweep.JOB_RECORD).read_text())["seed"]
    assert a == b
    np.testing.assert_array_equal(_sci(sd / "0" / "mosaic_b17.fits"),
                                  _sci(basic_sweep / "0" / "mosaic_b17.fits"))


def test_collect_masks_limits_that_are_not_quoted(tmp_path):
    """A job whose m50 is null (not quoted, with a reason) gets a masked m50 in the collected
    table, beside a job that quotes one, and its reason in a string column."""
    from simfield.sweep import collect

    for i, (m50, reason) in enumerate(((27.9, None), (None, "the fit does not describe the "
                                                             "data"))):
        job = tmp_path / str(i)
        (job / ".hydra").mkdir(parents=True)
        (job / ".hydra" / "overrides.yaml").write_text(f"- seed={i}\n")
        (job / "summary.json").write_text(json.dumps(
            {"seed": i, "score": {"b36": {"m50": m50, "m50_err": None if m50 is None else 0.1,
                                          "m50_reason": reason}}}))
        (job / "COMPLETE").write_text(f"simfield 0.1.0 seed {i} config x\nsummary.json\n")
    t = collect(tmp_path)
    col = t["score.b36.m50"]
    assert col.unit == "mag" and list(np.ma.getmaskarray(col)) == [False, True]
    assert col[0] == 27.9
    why = t["score.b36.m50_reason"]
    assert list(np.ma.getmaskarray(why)) == [True, False]
    assert why[1] == "the fit does not describe the data"
