"""Refusals of the real ``simfield`` command: one line, status 2, folders left as they were;
``--estimate`` and print-only flags; a killed run's worker processes die with it.

Each test starts real subprocesses (about 0.5 s for a refusal found by validation, 3-4 s for
one that needs the expected source count); the many-case property test is in
``tests/test_refusals.py``.
"""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.conftest import shared_psf_cache

SIMFIELD = [sys.executable, "-c", "from simfield.cli import main; main()"]


# --------------------------------------------------------------------------------------------
# the real command line
# --------------------------------------------------------------------------------------------
def _simfield(args, cwd, timeout=120):
    r = subprocess.run([*SIMFIELD, *args], cwd=cwd, capture_output=True, text=True,
                       timeout=timeout)
    return r.returncode, [ln for ln in r.stderr.splitlines() if ln.strip()], r.stdout


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def _fake_job(folder: Path, value: str) -> None:
    (folder / ".hydra").mkdir(parents=True)
    for name in ("config.yaml", "hydra.yaml", "overrides.yaml"):
        (folder / ".hydra" / name).write_text(f"# {name} of an earlier job: {value}\n")
    (folder / "summary.json").write_text("{}\n")


@pytest.mark.slow
@pytest.mark.parametrize("args, key", [
    (["survey.nokey=1"], "survey.nokey"),
    (["seed=abc"], "seed"),
    (["survey=nope"], "survey"),
    (["detector.ipc=2"], "detector.ipc"),
    (["survey=[quick,deep]"], "survey"),
    (["survey.width_arcsec=("], "survey.width_arcsec"),
    (["lens=none", "lens.redshift=nan"], "lens.redshift"),
    (["survey.width_arcsec=3600", "survey.height_arcsec=3600"], "population.max_sources"),
])
def test_cli_refusal_classes(tmp_path, args, key):
    """Real ``simfield`` runs: status 2, one line naming the key, nothing in the folder."""
    code, err, _ = _simfield(["survey=quick", *args], tmp_path)
    assert code == 2 and len(err) == 1 and err[0].startswith(f"simfield: error: {key}: "), err
    assert not any(tmp_path.iterdir())


@pytest.mark.slow
def test_cli_refuses_huge_mosaic_naming_estimate_limit_and_key(tmp_path):
    """survey.mosaic_pixel_arcsec=0.001 (a 100000^2 mosaic per band): refused before any work
    with the disk estimate, the limit and the key that raises it."""
    code, err, _ = _simfield(["survey.mosaic_pixel_arcsec=0.001"], tmp_path)
    assert code == 2 and len(err) == 1, err
    assert err[0].startswith("simfield: error: limits.disk_gb: 20.0 ")
    assert "GB" in err[0] and "raise limits.disk_gb" in err[0]
    assert not any(tmp_path.iterdir())


@pytest.mark.slow
def test_refused_override_leaves_existing_run_untouched(tmp_path):
    """A refused run into an existing run folder leaves its .hydra files byte-identical."""
    run = tmp_path / "run"
    _fake_job(run, "survey=quick")
    before = _snapshot(run)
    code, err, _ = _simfield(["survey=quick", "survey.n_exposures=0", f"hydra.run.dir={run}"],
                             tmp_path)
    assert code == 2 and len(err) == 1 and "survey.n_exposures" in err[0]
    assert _snapshot(run) == before


@pytest.mark.slow
def test_refused_sweep_leaves_existing_sweep_untouched(tmp_path):
    """A refused -m sweep (joblib launcher) into an existing sweep folder changes nothing."""
    sweep = tmp_path / "sweep"
    for n in ("0", "1"):
        _fake_job(sweep / n, f"seed={n}")
    (sweep / "multirun.yaml").write_text("# earlier sweep\n")
    before = _snapshot(sweep)
    code, err, _ = _simfield(["-m", "seed=1,2", "survey=quick", "survey.exposure_time_s=-5",
                              "hydra/launcher=parallel", f"hydra.sweep.dir={sweep}"], tmp_path)
    assert code == 2 and len(err) == 1 and "survey.exposure_time_s" in err[0], err
    assert _snapshot(sweep) == before


@pytest.mark.slow
def test_users_empty_folder_is_not_deleted(tmp_path):
    """mkdir myruns; simfield ... hydra.run.dir=myruns/a refused: myruns stays, empty; no
    outputs/ folder is made."""
    (tmp_path / "myruns").mkdir()
    code, err, _ = _simfield(["survey=quick", "seed=-1", "hydra.run.dir=myruns/a"], tmp_path)
    assert code == 2 and len(err) == 1 and err[0].startswith("simfield: error: seed: ")
    assert [p.name for p in tmp_path.iterdir()] == ["myruns"]
    assert not any((tmp_path / "myruns").iterdir())


@pytest.mark.slow
def test_estimate_prints_and_writes_nothing(tmp_path):
    """--estimate: status 0, the disk and memory figures, nothing written."""
    code, err, out = _simfield(["--estimate", "survey=quick"], tmp_path)
    assert code == 0 and "disk: " in out and "peak memory: " in out and "within" in out, out
    assert not any(tmp_path.iterdir())


@pytest.mark.slow
def test_print_only_flags_still_work(tmp_path):
    """--cfg job and --hydra-help still print (Hydra's own), --help the tool's page
    (tests/test_cli_help.py), status 0."""
    code, _, out = _simfield(["--cfg", "job", "survey=quick"], tmp_path)
    assert code == 0 and "limits:" in out and "name: quick" in out
    code, _, out = _simfield(["--hydra-help"], tmp_path)
    assert code == 0 and "--cfg" in out and "--multirun" in out
    code, _, out = _simfield(["--help"], tmp_path)
    assert code == 0 and "    * deep" in out and "    - quick" in out
    assert not any(tmp_path.iterdir())


def _children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        with contextlib.suppress(OSError):
            out += [int(c) for c in (task / "children").read_text().split()]
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/task").is_dir(), reason="needs Linux /proc")
def test_killed_run_takes_its_workers_with_it(tmp_path):
    """kill -9 of a run with two tile processes: no worker is alive 5 s later."""
    # the band and PSF of tests/test_robustness.py's tiny runs, from the session's PSF cache
    args = ["survey=quick", "survey.tile_pixels=200", "workers=2", "score.report=false",
            "telescope.bands=[{name:b17,center_nm:1700,width_nm:380,throughput:0.4,"
            "sky_mjy_sr:0.18}]", "selection=none", "telescope.psf.n_wavelengths=3",
            "telescope.field_psf.enabled=false", "telescope.drift.enabled=false",
            f"telescope.psf.cache_dir={shared_psf_cache()}", f"hydra.run.dir={tmp_path / 'run'}"]
    proc = subprocess.Popen([*SIMFIELD, *args], cwd=tmp_path, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    try:
        t0, kids = time.monotonic(), []
        while time.monotonic() - t0 < 120 and proc.poll() is None and len(kids) < 2:
            time.sleep(0.1)
            kids = _children(proc.pid)
        assert len(kids) >= 2, "the run never started its tile processes"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
        t0 = time.monotonic()
        while time.monotonic() - t0 < 5 and any(_alive(k) for k in kids):
            time.sleep(0.1)
        assert not [k for k in kids if _alive(k)]
    finally:
        if proc.poll() is None:
            proc.kill()


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self").is_dir(), reason="needs Linux /proc")
def test_run_and_output_folders_that_cannot_be_made_are_refused(tmp_path, capsys):
    """A run folder under /proc (a file system that holds no files) or through a file, and an
    --out of simfield-score, simfield-collect, simfield-inject or the counts figure there: one
    line naming the option or key, status 2, before any work (common practice: refuse what
    would fail later). Before, Hydra's mkdir or the tools' writers raised tracebacks."""
    (tmp_path / "f").write_text("")
    for args, key in ((["survey=quick", "hydra.run.dir=/proc/simfield_x"], "hydra.run.dir"),
                      (["survey=quick", f"hydra.run.dir={tmp_path / 'f' / 'x'}"],
                       "hydra.run.dir"),
                      (["-m", "survey=quick", "seed=1,2", "hydra.sweep.dir=/proc/simfield_x"],
                       "hydra.sweep.dir")):
        code, err, _ = _simfield(args, tmp_path)
        assert code == 2 and len(err) == 1 and err[0].startswith(f"simfield: error: {key}: "), err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["f"]
    from simfield.score.run import score_main_args
    from simfield.sweep import collect_main_args

    run, sweep = tmp_path / "run", tmp_path / "sweep"
    run.mkdir()
    sweep.mkdir()
    for prog, fn, where in (("simfield-score", score_main_args, run),
                            ("simfield-collect", collect_main_args, sweep)):
        assert fn([str(where), "--out", "/proc/simfield_x"]) == 2
        assert capsys.readouterr().err.strip() == (
            f"{prog}: error: --out: '/proc/simfield_x' must be a writable folder "
            "(/proc is not writable)")
    for cmd in ([sys.executable, "-c", "from simfield.cli import inject_main; inject_main()",
                 str(tmp_path / "f"), "--band", "b10", "--out", "/proc/simfield_x"],
                [sys.executable, "-m", "simfield.population.counts", "--out",
                 "/proc/simfield_x/c.png"]):
        r = subprocess.run(cmd, cwd=tmp_path, capture_output=True, text=True, timeout=120)
        lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
        assert r.returncode == 2 and len(lines) == 1 and "--out: '/proc/simfield_x" in lines[0] \
            and "must be a writable folder" in lines[0], lines
    assert sorted(p.name for p in tmp_path.iterdir()) == ["f", "run", "sweep"]


def test_unfinished_runs_sample_without_selection_and_another_band_are_refused(tmp_path,
                                                                              capsys):
    """simfield-score on a run folder without COMPLETE (the run stopped part way: its files
    may be partial), and --sample without --select-col or --zphot-col (it would be ignored);
    simfield-inject into an image whose BAND card names another band (its zero point and PSF
    would be the wrong band's). One line each, status 2, nothing written (common practice:
    refuse rather than score or inject what would mislead). Before, the first two went on
    silently and the third injected with the asked band's PSF. An image of one value, with no
    weight map, is refused too (its weights were 1/0)."""
    import numpy as np
    from astropy.io import fits

    from simfield.errors import CatalogError
    from simfield.grid import Grid
    from simfield.inject import inject_into_image
    from simfield.score.run import score_main_args
    from tests.conftest import make_scenario

    run = tmp_path / "run"
    run.mkdir()
    (run / "mosaic_b36.fits").write_bytes(b"")
    assert score_main_args([str(run)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "has no COMPLETE file: the run did not finish" in err[0], err
    assert score_main_args([str(run), "--sample", "z8"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["simfield-score: error: --sample z8: picks the samples that --select-col "
                   "or --zphot-col score; give one of them, or leave --sample out"]
    assert sorted(p.name for p in run.iterdir()) == ["mosaic_b36.fits"]

    g = Grid(64, 64, 0.04, 53.1, -27.8)
    h = fits.Header(g.wcs.to_header())
    h["ZP_AB"], h["BAND"] = 28.0, "b36"
    noise = np.random.default_rng(1).normal(0, 0.01, g.shape).astype(np.float32)
    fits.writeto(tmp_path / "img.fits", noise, h)
    with pytest.raises(CatalogError, match=r"band 'b23' asked for, but img.fits's BAND card "
                                           r"says 'b36'.*--band b36"):
        inject_into_image(tmp_path / "img.fits", make_scenario(), "b23", tmp_path / "out")
    # an image of one value has no scatter to make a weight map from (it was 1/0 = inf)
    fits.writeto(tmp_path / "flat.fits", np.zeros(g.shape, np.float32), h)
    with pytest.raises(CatalogError, match=r"flat.fits\[0\]: the image's pixels have no "
                                           r"scatter .*--weight-hdu"):
        inject_into_image(tmp_path / "flat.fits", make_scenario(), "b36", tmp_path / "out")
    assert not (tmp_path / "out").exists()
