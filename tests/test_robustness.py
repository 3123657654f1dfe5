"""Robustness: invalid and extreme settings, interrupted runs, identical reruns.

Validation properties (hypothesis): whatever value lands on any key of a composed scenario,
:func:`simfield.config.to_scenario` either accepts it or raises ConfigError naming that key;
nothing else escapes. Pipeline properties need the whole pipeline; they are skipped (with the
reason) only while ``simfield.pipeline.run_scenario`` raises ImportError.
"""

from __future__ import annotations

import copy
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from hydra import compose, initialize_config_dir
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from omegaconf import OmegaConf

from simfield.config import register_configs, to_scenario
from simfield.errors import ConfigError
from simfield.io import COMPLETE_MARKER
from simfield.sweep import remove_partial_files
from tests.conftest import CONF, make_scenario, shared_psf_cache

ROOT = Path(__file__).resolve().parent.parent

TINY = [
    "survey=quick", "survey.width_arcsec=8", "survey.height_arcsec=8",
    "telescope.bands=[{name:b17,center_nm:1700,width_nm:380,throughput:0.4,sky_mjy_sr:0.18}]",
    "selection=none",
    "telescope.psf.n_wavelengths=3", "score.report=false", "telescope.field_psf.enabled=false",
    "telescope.drift.enabled=false",
]

SETTINGS = settings(max_examples=30, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow,
                                           HealthCheck.function_scoped_fixture])


# --------------------------------------------------------------------------------------------
# the composed configuration as plain data, and its leaves
# --------------------------------------------------------------------------------------------
def _composed(*overrides: str) -> dict:
    register_configs()
    with initialize_config_dir(CONF, version_base=None):
        cfg = compose("config", overrides=list(overrides))
    return OmegaConf.to_container(cfg, resolve=True)


BASE = {name: _composed(*ov) for name, ov in
        (("quick", ("survey=quick",)), ("cluster", ("survey=quick", "lens=cluster")))}


def _leaves(d, prefix=()):
    """(path, value) of every scalar leaf; list items by index."""
    items = d.items() if isinstance(d, dict) else enumerate(d)
    for k, v in items:
        p = prefix + (k,)
        if isinstance(v, (dict, list)):
            yield from _leaves(v, p)
        else:
            yield p, v


def _key(path) -> str:
    return ".".join(str(p) for p in path)


def _set(d: dict, path, value) -> dict:
    d = copy.deepcopy(d)
    node = d
    for p in path[:-1]:
        node = node[p]
    node[path[-1]] = value
    return d


LEAVES = {name: [(p, v) for p, v in _leaves(base) if p[0] != "hydra"]
          for name, base in BASE.items()}
NUMERIC = {name: [p for p, v in leaves if isinstance(v, (int, float)) and not isinstance(v, bool)]
           for name, leaves in LEAVES.items()}


def _in_struct_list(path) -> bool:
    """Inside a list of records (telescope.bands.N.*, lens.components.N.*)."""
    return any(isinstance(p, int) for p in path[:-1])


TYPED = [p for p in NUMERIC["cluster"] if not _in_struct_list(p)]

# Invalid and extreme numbers: signs, zero, huge and tiny magnitudes, non-finite values.
EXTREME_NUMBERS = st.one_of(
    st.sampled_from([0, -1, -0.0, 1e-300, -1e-300, 1e300, -1e300, math.inf, -math.inf, math.nan,
                     2**31, 2**63, -(2**63), 1e18]),
    st.integers(min_value=-10**12, max_value=10**12),
    st.floats(allow_nan=True, allow_infinity=True, width=64),
)
# Values of the wrong type for a numeric key.
WRONG_TYPES = st.one_of(
    st.sampled_from([None, "", "abc", "1.5.2", "nan?", True, False, [], [1, 2], {"a": 1}]),
    st.text(alphabet="abcxyz_", min_size=1, max_size=6),
)


def _names(path) -> list[str]:
    """Keys a message about ``path`` may name: the key, or for a list item also the list."""
    names = [_key(path)]
    if isinstance(path[-1], int):
        names.append(_key(path[:-1]))
    return names


def _check_refused_or_valid(data: dict, path) -> None:
    """The property: accepted, or refused with ConfigError naming the key set."""
    try:
        to_scenario(data)
    except ConfigError as exc:
        assert any(n in str(exc) for n in _names(path)), \
            f"setting {_key(path)} was refused with a message naming another key: {exc}"


# --------------------------------------------------------------------------------------------
# validation properties
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("base", ["quick", "cluster"])
@SETTINGS
@given(data=st.data())
def test_extreme_numbers_refused_naming_key_or_valid(base, data):
    """Any number on any numeric key, without and with the cluster lens (so the lens and
    member checks are reached): validated, or ConfigError naming the key."""
    path = data.draw(st.sampled_from(NUMERIC[base]), label="key")
    value = data.draw(EXTREME_NUMBERS, label="value")
    _check_refused_or_valid(_set(BASE[base], path, value), path)


@pytest.mark.parametrize("base", ["quick", "cluster"])
def test_every_numeric_key_with_each_bad_number(base):
    """Exhaustively: every numeric key of the validated scenario set to each extreme number is
    refused by ``validate`` naming that key, or accepted (fast: no Hydra, no OmegaConf)."""
    from simfield.config import validate

    sc0 = to_scenario(BASE[base])
    bad = []
    for path in NUMERIC[base]:
        for value in (-1e300, -1, 0, 1e-300, 1e300, math.nan, math.inf, -math.inf):
            sc = _with_value(sc0, path, value)
            try:
                validate(sc)
            except ConfigError as exc:
                if not any(n in str(exc) for n in _names(path)):
                    bad.append(f"{_key(path)}={value!r}: {exc}")
            except Exception as exc:  # anything but ConfigError is a failure of validation
                bad.append(f"{_key(path)}={value!r}: {type(exc).__name__}: {exc}")
    assert not bad, "\n".join(bad)


def _with_value(sc0, path, value):
    """A deep copy of scenario ``sc0`` with the leaf at ``path`` set to ``value``."""
    sc = copy.deepcopy(sc0)
    node = sc
    for p in path[:-1]:
        node = node[p] if isinstance(p, int) else getattr(node, p)
    if isinstance(path[-1], int):
        node[path[-1]] = value
    else:
        setattr(node, path[-1], value)
    return sc


def test_non_finite_numbers_always_refused():
    """NaN and +-inf are never meaningful settings: every numeric key used by the cluster
    scenario refuses them (common practice: reject non-finite input before any work)."""
    from simfield.config import validate

    sc0 = to_scenario(BASE["cluster"])
    accepted = []
    for path in NUMERIC["cluster"]:
        for value in (math.nan, math.inf, -math.inf):
            if value == math.inf and path[-2:-1] in (("size_bins_arcsec",), ("z_bins",)) \
                    and path[-1] == len(getattr(sc0.score, path[-2])) - 1:
                continue  # +inf as the last bin edge is an open top bin
            sc = _with_value(sc0, path, value)
            try:
                validate(sc)
                accepted.append(f"{_key(path)}={value}")
            except (ConfigError, OverflowError):
                pass
    assert not accepted, ", ".join(accepted)


@SETTINGS
@given(data=st.data())
def test_wrong_types_refused_naming_key(data):
    """A value of the wrong type on a numeric key (outside lists of records, see below) is
    refused naming the key, or it converts to a number that validates."""
    path = data.draw(st.sampled_from(TYPED), label="key")
    value = data.draw(WRONG_TYPES, label="value")
    try:
        sc = to_scenario(_set(BASE["cluster"], path, value))
    except ConfigError as exc:
        assert any(n in str(exc) for n in _names(path)), str(exc)
        return
    node = sc
    for p in path:
        node = node[p] if isinstance(p, int) else getattr(node, p)
    assert isinstance(node, (int, float)) and not isinstance(node, bool), (path, value, node)


@pytest.mark.parametrize("path", [("telescope", "bands", 0, "center_nm"),
                                  ("lens", "components", 0, "mass_msun")])
def test_wrong_type_in_list_of_records_names_full_key(path):
    """A wrong type inside telescope.bands.N / lens.components.N names the full key."""
    with pytest.raises(ConfigError, match=r"\.".join(str(p) for p in path)):
        to_scenario(_set(BASE["cluster"], path, "abc"))


@SETTINGS
@given(data=st.data())
def test_bad_choices_refused_naming_key(data):
    """An unknown choice for a string option (pupil kind, lens kind, kernel, band, ...) is
    refused naming the key; free-text options (names, paths) accept it."""
    strings = [(p, v) for p, v in LEAVES["cluster"] if isinstance(v, str)]
    path, old = data.draw(st.sampled_from(strings), label="key")
    # never a valid choice of an enumerated option (switching to a valid choice may rightly
    # make another key invalid, e.g. a shear component turned into an NFW halo needs a mass)
    value = data.draw(st.one_of(st.text(alphabet="abcdefgh_ ", max_size=8).map(lambda t: "zz" + t),
                                st.sampled_from(["", " ", "NONE", "Cluster", "b99", "1"])),
                      label="value")
    _check_refused_or_valid(_set(BASE["cluster"], path, value), path)


@settings(max_examples=12, deadline=None, derandomize=True)
@given(key=st.sampled_from(["survey.width_arcsec", "survey.n_exposures", "survey.pixfrac",
                            "detector.read_noise_e", "detector.n_groups", "seed",
                            "telescope.psf.oversample", "population.z_max",
                            "detection.threshold_sigma", "score.mag_step"]),
       text=st.sampled_from(["0", "-1", "-1e9", "1e9", "nan", "inf", "-inf", "0.5", "3", "abc",
                             "null", "true", "[1,2]", "1e-300"]))
def test_command_line_overrides_refused_naming_key(key, text):
    """The command-line path (Hydra compose of ``key=value``) obeys the same rule; a value
    Hydra itself cannot merge into the typed schema (3.5 for an integer) is refused by Hydra
    at composition, also naming the key."""
    from hydra.errors import ConfigCompositionException

    try:
        make_scenario("survey=quick", f"{key}={text}")
    except ConfigError as exc:
        assert key in str(exc), str(exc)
    except ConfigCompositionException as exc:
        assert key in f"{exc} {exc.__cause__}", f"{exc} {exc.__cause__}"


def test_unknown_key_is_a_config_error():
    """A misspelt key added on the command line is a ConfigError naming it."""
    with pytest.raises(ConfigError, match=r"survey\.n_exposure\b"):
        make_scenario("survey=quick", "+survey.n_exposure=3")


def test_cli_refuses_bad_value_with_one_line(tmp_path):
    """``simfield`` with a bad value: exit status 2, one error line naming the key, no run
    directory left behind."""
    run = tmp_path / "run"
    r = subprocess.run([sys.executable, "-c", "from simfield.cli import main; main()",
                        "survey=quick", "survey.n_exposures=0", f"hydra.run.dir={run}"],
                       cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    err = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(err) == 1 and err[0].startswith("simfield: error: "), r.stderr
    assert "survey.n_exposures" in err[0]
    assert not run.exists()


# --------------------------------------------------------------------------------------------
# pipeline properties (need every stage)
# --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    """One in-process run of the tiny scenario; skipped while the pipeline raises ImportError."""
    from simfield.pipeline import run_scenario

    out = tmp_path_factory.mktemp("tiny")
    try:
        run_scenario(make_scenario(*TINY), out)
    except ImportError as exc:
        pytest.skip(f"pipeline stages not all importable yet: {exc}")
    return out


def _check_final_files(run_dir: Path) -> list[Path]:
    """Every file under a final name is whole: FITS verify, ECSV and JSON parse."""
    import json

    checked = []
    for p in sorted(run_dir.rglob("*")):
        if not p.is_file() or p.name.endswith(".part") or ".hydra" in p.parts:
            continue
        if p.suffix == ".fits":
            with fits.open(p) as hl:
                hl.verify("exception")
                for h in hl:
                    _ = h.data  # reading the data fails on a truncated file
        elif p.suffix == ".ecsv":
            Table.read(p, format="ascii.ecsv")
        elif p.suffix == ".json":
            json.loads(p.read_text())
        checked.append(p)
    return checked


def _science_arrays(run_dir: Path) -> dict[str, np.ndarray]:
    out = {}
    for p in sorted(run_dir.glob("*.fits")):
        with fits.open(p) as hl:
            for h in hl:
                if h.data is not None:
                    out[f"{p.name}[{h.name}]"] = np.array(h.data)
    return out


@pytest.mark.slow
def test_identical_reruns_identical_arrays(tiny_run, tmp_path):
    """The same scenario and seed run again give identical arrays in every FITS file."""
    from simfield.pipeline import run_scenario

    run_scenario(make_scenario(*TINY), tmp_path)
    a, b = _science_arrays(tiny_run), _science_arrays(tmp_path)
    assert a.keys() == b.keys() and any(k.startswith("mosaic_") for k in a)
    for k in a:
        if a[k].dtype.names:  # tables
            assert a[k].tobytes() == b[k].tobytes(), k
        else:
            np.testing.assert_array_equal(a[k], b[k], err_msg=k)


@pytest.mark.slow
def test_killed_run_leaves_whole_files_and_rerun_succeeds(tiny_run, tmp_path):
    """A run killed (SIGKILL) mid-way leaves no COMPLETE marker and no half-written file under
    a final name; running again into the same directory completes, identical to a clean run."""
    run = tmp_path / "run"
    cmd = [sys.executable, "-c", "from simfield.cli import main; main()", *TINY,
           f"telescope.psf.cache_dir={shared_psf_cache()}",  # tiny_run's PSF, not the user's
           f"hydra.run.dir={run}"]
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    try:
        t0 = time.monotonic()
        # kill once the run has started writing science files (the PSFs come before mosaics)
        while time.monotonic() - t0 < 120 and proc.poll() is None:
            if any(run.glob("psf_*.fits")) or any(run.glob("truth_image_*")):
                break
            time.sleep(0.05)
        time.sleep(0.3)
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=60)
    killed = proc.returncode == -signal.SIGKILL
    if killed:
        assert not (run / COMPLETE_MARKER).exists()
    _check_final_files(run)
    # what the command line does before running into an existing directory
    remove_partial_files(run)
    from simfield.pipeline import run_scenario

    run_scenario(make_scenario(*TINY), run)
    assert (run / COMPLETE_MARKER).is_file()
    assert len(_check_final_files(run)) > 3
    assert not list(run.rglob("*.part"))
    np.testing.assert_array_equal(fits.getdata(run / "mosaic_b17.fits", "IMAGE"),
                                  fits.getdata(tiny_run / "mosaic_b17.fits", "IMAGE"))
