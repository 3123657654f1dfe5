"""Configuration: every preset composes, bad values are refused with one clear message."""

import pytest

from simfield.errors import ConfigError
from tests.conftest import make_scenario


@pytest.mark.parametrize("overrides", [
    (), ("survey=quick",), ("telescope=circular",), ("population=uniform",),
])
def test_presets_compose_and_validate(overrides):
    """Each shipped preset gives a valid scenario."""
    sc = make_scenario(*overrides)
    assert sc.band_names


@pytest.mark.parametrize("override, key", [
    ("survey.exposure_time_s=-10", "survey.exposure_time_s"),
    ("population.selection_band=b99", "population.selection_band"),
    ("population.z_min=20", "population.z_max"),
    ("telescope.bands.0.width_nm=0", "telescope.bands.0.width_nm"),
    ("detector.gain_e_adu=0", "detector.gain_e_adu"),
    ("seed=-1", "seed"),
])
def test_bad_values_name_the_key(override, key):
    """A bad value raises ConfigError naming the key, the value and what is allowed."""
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")) as err:
        make_scenario(override)
    assert "must" in str(err.value)


def test_reversed_redshift_range_message():
    """z_min above z_max is refused, naming both keys."""
    with pytest.raises(ConfigError, match=r"population\.z_max=.*population\.z_min=9"):
        make_scenario("population.z_min=9", "population.z_max=3")


def test_unknown_key_refused():
    """A key the schema does not know is refused (typed schemas, not free dictionaries)."""
    with pytest.raises(Exception, match="exposure_tme"):
        make_scenario("+survey.exposure_tme=3")
