"""Shared fixtures: compose scenarios from conf/ without the command line."""

import copy
import os
import shutil
import tempfile

import pytest
from hydra import compose, initialize_config_dir

# numba: the tests compile the fused pixel loops (simfield.pixelops) at LLVM optimisation level
# 1, not 3: about half the ~15 s each test process spends compiling them in a fresh clone, with
# the same results bit for bit (no fast-math, so no reordered arithmetic; the bit-identity
# tests of tests/test_detector_fast.py run on this code). They go to a cache folder of their
# own, shared by the test processes and their command-line runs, so a run outside the tests
# never loads code compiled this way. Set before simfield (and numba) is imported.
_ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
os.environ.setdefault("NUMBA_OPT", "1")
os.environ.setdefault("NUMBA_CACHE_DIR", os.path.join(_ROOT, ".numba-test-cache"))

from simfield.config import CONF_DIR, register_configs, to_scenario

CONF = CONF_DIR

#: One PSF disk cache for the whole test session, shared by the xdist workers (they inherit the
#: variable): each PSF is computed once per session instead of once per test folder, and no test
#: writes to the user's cache. Tests of the cache itself pass their own folder.
_PSF_CACHE_ENV = "SIMFIELD_TEST_PSF_CACHE"


def pytest_configure(config):
    if not hasattr(config, "workerinput") and _PSF_CACHE_ENV not in os.environ:
        config._simfield_psf_cache = tempfile.mkdtemp(prefix="simfield-test-psf-")
        os.environ[_PSF_CACHE_ENV] = config._simfield_psf_cache


def pytest_unconfigure(config):
    path = getattr(config, "_simfield_psf_cache", None)
    if path:
        shutil.rmtree(path, ignore_errors=True)
        os.environ.pop(_PSF_CACHE_ENV, None)


def shared_psf_cache() -> str:
    """The session's PSF cache folder (made on first use if the session did not set one)."""
    if _PSF_CACHE_ENV not in os.environ:
        os.environ[_PSF_CACHE_ENV] = tempfile.mkdtemp(prefix="simfield-test-psf-")
    return os.environ[_PSF_CACHE_ENV]


def make_scenario(*overrides: str):
    """A validated Scenario from conf/ with Hydra ``overrides``.

    The field-dependent PSF and the wavefront drift are off unless an override names
    ``telescope.field_psf`` / ``telescope.drift`` or picks a telescope: their extra PSFs cost
    seconds per band with the empty PSF cache of a test, and only tests/test_field_psf.py and
    tests/test_drift.py test them. The PSF cache is the session's (:func:`shared_psf_cache`)
    unless an override names ``telescope.psf.cache_dir``. The same overrides give an equal
    Scenario composed once per process (a deep copy each call).
    """
    register_configs()
    overrides = list(overrides)
    if not any(o.startswith("telescope.psf.cache_dir=") for o in overrides):
        overrides.insert(0, f"telescope.psf.cache_dir={shared_psf_cache()}")
    for key in ("telescope.field_psf", "telescope.drift"):
        if not any(o.startswith((key, "telescope=")) for o in overrides):
            overrides.insert(0, f"{key}.enabled=false")
    memo = tuple(overrides)
    if memo not in _COMPOSED:
        with initialize_config_dir(CONF, version_base=None):
            cfg = compose("config", overrides=overrides)
        _COMPOSED[memo] = to_scenario(cfg)
    return copy.deepcopy(_COMPOSED[memo])


#: Scenarios composed so far in this process, by their full override list: Hydra's compose
#: takes ~0.3 s, and many tests compose the same scenario; each caller gets its own deep copy
#: (tests change bands and other fields in place). Refused overrides are not kept: they are
#: composed, and refused, every time.
_COMPOSED: dict = {}


@pytest.fixture
def scenario_factory():
    return make_scenario
