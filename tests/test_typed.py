"""The fast scenario builder (simfield._typed) gives exactly OmegaConf's structured result.

Reference: OmegaConf's own conversion, ``OmegaConf.to_object(OmegaConf.merge(
OmegaConf.structured(Scenario), data))``, which to_scenario used alone before. ``repr`` of the
dataclasses is compared, so a float that stayed an int (1 vs 1.0) would show.
"""

from __future__ import annotations

import copy

import pytest
from hydra import compose, initialize_config_dir
from omegaconf import OmegaConf

from simfield._typed import build_exact
from simfield.config import CONF_DIR, Scenario, register_configs


def _omegaconf(data):
    return OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(Scenario), data))


@pytest.fixture(scope="module")
def composed():
    """Plain data of the default scenario, of the other presets of the groups, and of value
    overrides."""
    register_configs()
    presets = [[],
               ["telescope=circular", "survey=quick", "lens=cluster", "population=uniform",
                "cluster=slurm"],
               ["telescope=lantern_ideal", "survey=wide", "population=grid",
                "+experiment=selection_grid"],
               ["seed=7", "survey.n_exposures=3", "telescope.psf.oversample=3",
                "population.z_max=9"]]
    out = []
    with initialize_config_dir(CONF_DIR, version_base=None):
        for ov in presets:
            cfg = compose("config", overrides=ov)
            data = OmegaConf.to_container(cfg, resolve=True)
            data.pop("hydra", None)
            out.append((ov, data))
    return out


def test_exact_data_builds_the_same_scenario_as_omegaconf(composed):
    for ov, data in composed:
        fast = build_exact(Scenario, copy.deepcopy(data))
        assert fast is not None, ov  # every preset is exactly typed
        assert repr(fast) == repr(_omegaconf(data)), ov


def test_ints_given_to_float_fields_become_floats_like_omegaconf(composed):
    data = copy.deepcopy(composed[0][1])
    data["survey"]["exposure_time_s"] = 600  # int for a float key
    data["telescope"]["bands"][0]["center_nm"] = 1000
    fast = build_exact(Scenario, data)
    assert type(fast.survey.exposure_time_s) is float
    assert type(fast.telescope.bands[0].center_nm) is float
    assert repr(fast) == repr(_omegaconf(data))


@pytest.mark.parametrize("path, value", [
    (("seed",), "5"),                       # a string for an int: OmegaConf converts
    (("seed",), 5.0),                       # a float for an int
    (("seed",), True),                      # a bool for an int
    (("survey", "exposure_time_s"), "1e3"),  # a string for a float
    (("detector", "ipc"), 1),               # an int for a bool
    (("survey", "nokey"), 1),               # an unknown key
    (("telescope", "bands", 0, "name"), "???"),  # a missing value
    (("telescope", "name"), "${seed}"),     # an interpolation
    (("telescope", "bands"), {"a": 1}),     # a mapping for a list
])
def test_anything_else_is_left_to_omegaconf(composed, path, value):
    data = copy.deepcopy(composed[0][1])
    node = data
    for k in path[:-1]:
        node = node[k]
    node[path[-1]] = value
    assert build_exact(Scenario, data) is None
