"""Shared fixtures: compose scenarios from conf/ without the command line."""

import pytest
from hydra import compose, initialize_config_dir

from simfield.config import CONF_DIR, register_configs, to_scenario

CONF = CONF_DIR


def make_scenario(*overrides: str):
    """A validated Scenario from conf/ with Hydra ``overrides``."""
    register_configs()
    with initialize_config_dir(CONF, version_base=None):
        cfg = compose("config", overrides=list(overrides))
    return to_scenario(cfg)


@pytest.fixture
def scenario_factory():
    return make_scenario
