"""Shared fixtures: compose scenarios from conf/ without the command line."""

import pytest
from hydra import compose, initialize_config_dir

from simfield.config import CONF_DIR, register_configs, to_scenario

CONF = CONF_DIR


def make_scenario(*overrides: str):
    """A validated Scenario from conf/ with Hydra ``overrides``.

    The field-dependent PSF and the wavefront drift are off unless an override names
    ``telescope.field_psf`` / ``telescope.drift`` or picks a telescope: their extra PSFs cost
    seconds per band with the empty PSF cache of a test, and only tests/test_field_psf.py and
    tests/test_drift.py test them.
    """
    register_configs()
    overrides = list(overrides)
    for key in ("telescope.field_psf", "telescope.drift"):
        if not any(o.startswith((key, "telescope=")) for o in overrides):
            overrides.insert(0, f"{key}.enabled=false")
    with initialize_config_dir(CONF, version_base=None):
        cfg = compose("config", overrides=overrides)
    return to_scenario(cfg)


@pytest.fixture
def scenario_factory():
    return make_scenario
