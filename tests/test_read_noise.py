"""detector.read_noise_e (CDS) and detector.read_noise_frame_e (one frame), one helper.

Source: Rauscher et al. 2007, PASP 119, 768, the CDS limit of their eq. 1 (n = 2 groups of
m = 1 frame): the read noise of the difference of two frames is sigma_CDS = sqrt(2) sigma_frame.
The check simulates two independent Gaussian frames here in the test (numpy only), and an
up-the-ramp exposure of simfield.detector with only read noise on.
"""

from __future__ import annotations

import dataclasses
import math
import os
import subprocess
import sys

import numpy as np
import pytest

from simfield import detector as dt
from simfield.config import DetectorConfig, _validate_detector, frame_read_noise_e, to_scenario
from simfield.errors import ConfigError
from simfield.survey.depth import predicted_depth

QUIET = dict(ipc=False, flat=False, bad_pixels=False, cosmic_rays=False, saturation=False,
             quantize=False, dark_current=False, poisson=False)


def _det(**kw) -> DetectorConfig:
    det = dataclasses.replace(DetectorConfig(), **kw)
    _validate_detector(det)  # derives read_noise_e from read_noise_frame_e, as to_scenario does
    return det


def _cds_noise_of_exposure(det: DetectorConfig, t: float = 300.0) -> float:
    """Read noise (e-) of a zero-signal CDS exposure: std of the slope x the baseline."""
    shape = (400, 400)
    fixed = dt.make_fixed_pattern(shape, det, np.random.default_rng(0))
    e = dt.expose(np.zeros(shape), 0.0, None, det, t, 18.0, np.random.default_rng(3), fixed)
    return float(e.sci.std() * t)


def test_frame_monte_carlo_gives_sqrt2():
    """Two frames of noise sigma_f: their difference has sqrt(2) sigma_f (Rauscher et al. 2007)."""
    sigma_f = 5.0
    rng = np.random.default_rng(11)
    frames = sigma_f * rng.standard_normal((2, 400_000))
    cds = frames[1] - frames[0]
    assert cds.std() == pytest.approx(math.sqrt(2.0) * sigma_f, rel=0.005)
    det = _det(read_noise_frame_e=sigma_f, **QUIET)
    assert det.read_noise_e == pytest.approx(cds.std(), rel=0.005)


def test_read_noise_e_is_cds_in_the_exposure():
    """read_noise_e=12 is the CDS noise: a 2-group, 1-frame exposure shows 12 e-, not 12 sqrt 2."""
    det = _det(n_groups=2, n_frames=1, read_noise_e=12.0, **QUIET)
    assert frame_read_noise_e(det) == pytest.approx(12.0 / math.sqrt(2.0), rel=1e-12)
    assert _cds_noise_of_exposure(det) == pytest.approx(12.0, rel=0.01)


def test_frame_key_gives_sqrt2_in_the_exposure():
    det = _det(n_groups=2, n_frames=1, read_noise_frame_e=5.0, **QUIET)
    assert det.read_noise_e == pytest.approx(math.sqrt(2.0) * 5.0, rel=1e-12)
    assert frame_read_noise_e(det) == 5.0
    assert _cds_noise_of_exposure(det) == pytest.approx(math.sqrt(2.0) * 5.0, rel=0.01)


def test_depth_and_detector_agree_for_both_spellings():
    """Predicted depth and the detector's frame variance are the same whichever key is set."""
    by_cds = _det(read_noise_e=10.0)
    by_frame = _det(read_noise_frame_e=10.0 / math.sqrt(2.0))
    args = (1000.0, 4, 28.0, 0.2, 0.04, 0.2)
    assert predicted_depth(by_cds, *args) == pytest.approx(predicted_depth(by_frame, *args),
                                                           abs=1e-9)
    assert dt._readout(by_cds, 1000.0)[1] == pytest.approx(dt._readout(by_frame, 1000.0)[1])
    off = _det(read_noise_frame_e=5.0, read_noise=False)
    assert frame_read_noise_e(off) == 0.0


def test_inconsistent_pair_refused_in_to_scenario():
    from hydra import compose, initialize_config_dir

    from simfield.config import CONF_DIR, register_configs

    register_configs()
    with initialize_config_dir(CONF_DIR, version_base=None):
        bad = compose("config", overrides=["survey=quick", "detector.read_noise_e=9",
                                           "detector.read_noise_frame_e=5"])
        good = compose("config", overrides=["survey=quick", "detector.read_noise_e=7.0711",
                                            "detector.read_noise_frame_e=5"])
    with pytest.raises(ConfigError) as exc:
        to_scenario(bad)
    assert exc.value.key == "detector.read_noise_frame_e"
    assert "\n" not in str(exc.value)
    assert to_scenario(good).detector.read_noise_e == pytest.approx(7.0711, rel=1e-4)


@pytest.mark.parametrize("cds", ["12", "9"])
def test_cli_refuses_both_keys_set_apart(tmp_path, cds):
    """Both keys on the command line, inconsistent (12 is also the preset value): one line,
    exit 2, nothing written."""
    env = dict(os.environ, XDG_CACHE_HOME=str(tmp_path / "cache"))
    r = subprocess.run([sys.executable, "-c", "from simfield.cli import main; main()",
                        "survey=quick", f"detector.read_noise_e={cds}",
                        "detector.read_noise_frame_e=5"],
                       cwd=tmp_path, capture_output=True, text=True, env=env, timeout=120)
    assert r.returncode == 2, r.stderr
    assert r.stderr.count("\n") == 1 and "detector.read_noise_frame_e: 5" in r.stderr
    assert r.stdout == ""
    assert [p.name for p in tmp_path.iterdir() if p.name != "cache"] == []
