"""Refusals at the edge: every bad command line is one line on stderr, status 2, nothing written.

The property test (hypothesis, 500 examples) goes through :func:`simfield.cli.main` in this
process, which calls :func:`simfield.cli.preflight` before Hydra; real ``simfield``
subprocesses are in ``tests/test_cli_refusals.py``.
"""

from __future__ import annotations

import contextlib
import io
import os
import sys
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from omegaconf import OmegaConf

from simfield import cli
from simfield.config import CONF_DIR, schema_type
from simfield.errors import ConfigError
from tests.conftest import make_scenario, shared_psf_cache

BASE = ["survey=quick"]
CLUSTER = ["survey=quick", "lens=cluster"]


# --------------------------------------------------------------------------------------------
# the keys of every group, from the composed configuration
# --------------------------------------------------------------------------------------------
def _leaves(d, prefix=""):
    items = d.items() if isinstance(d, dict) else enumerate(d)
    for k, v in items:
        key = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, dict) or (isinstance(v, list) and v and isinstance(v[0], dict)):
            yield from _leaves(v, key)
        else:
            yield key, v


_CFG = OmegaConf.to_container(OmegaConf.structured(make_scenario(*CLUSTER)), resolve=True)
LEAVES = dict(_leaves(_CFG))
BOOLS = [k for k in LEAVES if schema_type(k) is bool]
INTS = [k for k in LEAVES if schema_type(k) is int]
FLOATS = [k for k in LEAVES if schema_type(k) is float]
SCALARS = BOOLS + INTS + FLOATS + [k for k in LEAVES if schema_type(k) is str]
GROUPS = sorted(p.name for p in Path(CONF_DIR).iterdir()
                if p.is_dir() and p.name not in ("hydra", "experiment", "__pycache__"))
BANDS = [b["name"] for b in _CFG["telescope"]["bands"]]
SECTIONS = ["telescope", "telescope.pupil", "telescope.psf", "telescope.bands.0", "population",
            "lens", "lens.components.0", "detector", "survey", "detection", "photometry",
            "photoz", "score", "selection", "selection.samples.0",
            "selection.samples.0.conditions.0", "limits"]

word = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=6)


def _case(key: str, value: str, names: tuple[str, ...] | None = None):
    """(overrides, keys the message may name): on the cluster scenario, so every lens and
    component key is reached."""
    return CLUSTER + [f"{key}={value}"], names or (key,)


INVALID = st.one_of(
    # wrong types on numeric keys
    st.builds(_case, st.sampled_from(INTS + FLOATS),
              st.sampled_from(["abc", "'12'x", "{a:1}", "true", "false", "1.2.3"])),
    # unknown keys in every section
    st.builds(lambda s, w: _case(f"{s}.zz{w}", "1"), st.sampled_from(SECTIONS), word),
    # unknown presets of every group
    st.builds(lambda g, w: _case(g, f"zz{w}"), st.sampled_from(GROUPS), word),
    # null and lists where scalars go
    st.builds(_case, st.sampled_from(SCALARS), st.sampled_from(["null", "[1,2]", "[]"])),
    # non-finite numbers on float keys
    st.builds(_case, st.sampled_from(FLOATS), st.sampled_from(["nan", "inf", "-inf"])),
    # out of range: below every lower bound / beyond every upper bound
    st.builds(_case, st.sampled_from(FLOATS), st.sampled_from(["-1e30", "1e30"])),
    st.builds(_case, st.sampled_from(INTS), st.just("-1000000000000")),
    # booleans given numbers or words
    st.builds(_case, st.sampled_from(BOOLS), st.sampled_from(["2", "0", "1", "yes", "on", "x"])),
    # duplicate bands
    st.builds(lambda b: _case("detection.bands", f"[{b},{b}]"), st.sampled_from(BANDS)),
    # a preset group given a list
    st.builds(lambda g: _case(g, "[a,b]"), st.sampled_from(GROUPS)),
)


def _refusal(argv: list[str], cwd: Path) -> tuple[int, list[str]]:
    """Run ``cli.main`` in-process on ``argv`` from ``cwd``: (exit status, stderr lines)."""
    err = io.StringIO()
    old_argv, old_cwd = sys.argv, os.getcwd()
    sys.argv = ["simfield", *argv]
    os.chdir(cwd)
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            cli.main()
        code = 0
    except SystemExit as exc:
        code = exc.code
    finally:
        sys.argv = old_argv
        os.chdir(old_cwd)
    return code, [ln for ln in err.getvalue().splitlines() if ln.strip()]


@pytest.fixture(scope="module")
def empty_dir(tmp_path_factory):
    return tmp_path_factory.mktemp("cwd")


@settings(max_examples=500, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(case=INVALID)
def test_invalid_overrides_refused_in_one_line_naming_key(case, empty_dir):
    """Any invalid override of any group: status 2, one 'simfield: error: <key>: ...' line
    naming the key, and nothing written (not even Hydra's output folders)."""
    overrides, names = case
    run_dir = empty_dir / "run"
    code, err = _refusal([*overrides, f"hydra.run.dir={run_dir}"], empty_dir)
    assert code == 2, (overrides, err)
    assert len(err) == 1 and err[0].startswith("simfield: error: "), (overrides, err)
    named = err[0][len("simfield: error: "):].split(":")[0]
    assert named in names or any(named.startswith(n + ".") for n in names), (overrides, err)
    assert not any(empty_dir.iterdir()), list(empty_dir.iterdir())


def test_preflight_composes_like_hydra():
    """preflight's scenario is the one Hydra's compose gives for the same overrides (its cache
    of preset compositions changes nothing)."""
    # telescope.field_psf / drift keys: make_scenario then keeps them as given
    for ov in (["survey=quick", "seed=5", "survey.n_exposures=3", "telescope.field_psf.grid=4",
                "telescope.drift.step_nm=5"],
               ["lens=cluster", "survey=quick", "detector.ipc=false",
                "telescope.field_psf.enabled=true", "telescope.drift.enabled=true"],
               ["telescope=circular", "survey=quick", "score.mag_step=0.5"]):
        ov = [*ov, f"telescope.psf.cache_dir={shared_psf_cache()}"]  # make_scenario's default
        assert cli.preflight(ov) == [make_scenario(*ov)], ov


def test_preflight_expands_sweeps_like_the_basic_sweeper():
    """-m and experiment presets give one scenario per job (4 of depth_vs_exposures)."""
    jobs = cli.preflight(["+experiment=depth_vs_exposures"])
    assert [sc.survey.n_exposures for sc in jobs] == [1, 2, 4, 8]
    jobs = cli.preflight(["-m", "seed=1,2", "lens=none,cluster", "survey=quick"])
    assert sorted((sc.seed, sc.lens.kind) for sc in jobs) == \
        [(1, "cluster"), (1, "none"), (2, "cluster"), (2, "none")]
    with pytest.raises(ConfigError, match="survey.exposure_time_s"):
        cli.preflight(["-m", "seed=1,2", "survey=quick", "survey.exposure_time_s=1,-5"])
    # a sweep element of the wrong type: the line names the key and the sweep as typed
    with pytest.raises(ConfigError) as info:
        cli.preflight(["-m", "survey=quick", "seed=1,x"])
    line = cli.refusal_line(info.value)
    assert line == "seed: '1,x' is not accepted: must be a whole number", line


@pytest.mark.parametrize("overrides, key, text", [
    (["survey.nokey=1"], "survey.nokey", "is not a key of survey"),
    (["seed=abc"], "seed", "is not accepted: must be a whole number"),
    (["survey.width_arcsec=wide"], "survey.width_arcsec", "is not accepted: must be a number"),
    (["survey=nope"], "survey", "must be one of: deep, quick"),
    # a near miss is named (difflib's closest match, ratio >= 0.7)
    (["survey=quik"], "survey", "is not a preset (did you mean quick?); must be one of"),
    (["survey.widht_arcsec=20"], "survey.widht_arcsec",
     "is not a key of survey (did you mean width_arcsec?); known keys: name,"),
    (["detectoin.threshold=3"], "detectoin.threshold",
     "is not a known key (did you mean detection.threshold?)"),
    (["seed=null"], "seed", "is not Optional"),
    (["survey.n_exposures=[1,2]"], "survey.n_exposures", "is not accepted"),
    (["survey.width_arcsec=("], "survey.width_arcsec", "is not a valid override"),
    (["survey=[quick,deep]"], "survey", "must be one preset"),
    (["detector.ipc=2"], "detector.ipc", "must be true or false"),
    (["lens=none", "lens.redshift=nan"], "lens.redshift", "must be in"),
    (["detection.bands=[b36,b36]"], "detection.bands", "twice"),
    (["score.reference_mag=45"], "score.reference_mag", "must be in [22, 32]"),
    (["seed=1,2"], "seed", "run it with -m"),
])
def test_refusal_messages(overrides, key, text):
    """Each class of refusal names its key and says what is allowed."""
    with pytest.raises(ConfigError) as info:
        cli.preflight(["survey=quick", *overrides])
    line = cli.refusal_line(info.value)
    assert line.startswith(f"{key}: ") and text in line and "\n" not in line, line


def test_too_many_sources_refused_up_front():
    """A 1 deg^2 field expects more candidates than population.max_sources: refused naming
    it, with the expected count from the luminosity function (the number the population stage
    would compare, simfield.population.lightcone.expected_galaxies)."""
    with pytest.raises(ConfigError, match=r"population\.max_sources.*sources expected"):
        cli.preflight(["survey.width_arcsec=3600", "survey.height_arcsec=3600"])


def test_narrow_match_to_band_refused_up_front(tmp_path):
    """photometry.match_to naming a band whose PSF is narrower than another's is refused by
    the preflight, before any file (matching to it would deconvolve: the photometry itself
    refuses it, but only after the mosaics); the PSFs it compares are made without writing
    the PSF cache. The reddest band has the broadest diffraction-limited PSF (FWHM ~ lambda /
    D, common practice) and is accepted."""
    cache = tmp_path / "cache"
    with pytest.raises(ConfigError) as info:
        cli.preflight(["survey=quick", "photometry.match_to=b10",
                       f"telescope.psf.cache_dir={cache}"])
    line = cli.refusal_line(info.value)
    assert line.startswith("photometry.match_to: 'b10'") and "narrower than" in line \
        and "b36" in line, line
    assert not cache.exists()
    cli.preflight(["survey=quick", "photometry.match_to=b36", f"telescope.psf.cache_dir={cache}"])


def test_unwritable_cache_folder_refused(tmp_path):
    """The PSF cache folder must be creatable and writable: a path under a file or under a
    pseudo file system (/proc) is refused, a new folder under a writable one is accepted and
    not created."""
    (tmp_path / "file").write_text("x")
    for bad in ("/proc/nope", str(tmp_path / "file" / "psf")):
        with pytest.raises(ConfigError, match="telescope.psf.cache_dir"):
            cli.preflight(["survey=quick", f"telescope.psf.cache_dir={bad}"])
    new = tmp_path / "a" / "b"
    cli.preflight(["survey=quick", f"telescope.psf.cache_dir={new}"])
    assert not (tmp_path / "a").exists()


def test_estimate_reports_a_run_over_the_limits(capsys):
    """--estimate of a 100000^2-pixel mosaic per band prints the estimate and the refusal."""
    cli._print_estimate(["survey.mosaic_pixel_arcsec=0.001"])
    out = capsys.readouterr().out
    assert "disk: " in out and "would be refused: limits.disk_gb: 20.0 is exceeded" in out, out


def test_notebook_scenarios_name_near_misses_and_types_plainly():
    """The same wording from Python (simfield.config.to_scenario on a dict) as from the
    command line: the closest known key (difflib, ratio >= 0.7), and 'must be a whole number'
    for OmegaConf's failed conversion to Integer."""
    from simfield.config import to_scenario

    with pytest.raises(ConfigError, match=r"is not a key of survey \(did you mean "
                                          r"width_arcsec\?\); known keys: name,"):
        to_scenario({"survey": {"widht_arcsec": 20.0}})
    with pytest.raises(ConfigError) as info:
        to_scenario({"survey": {"n_exposures": "four"}})
    assert info.value.key == "survey.n_exposures" and \
        info.value.allowed == "is not accepted: must be a whole number", info.value
