"""README.md's "From Python" example runs as written.

Source: the README itself; the code block under "## From Python" is extracted and executed
with two textual changes only (overrides for a smaller, faster field on top of survey=quick
with the test session's PSF cache, and a temporary output folder), so a broken import, call
or key in the README fails here.
"""

from __future__ import annotations

import re
from pathlib import Path

from tests.conftest import shared_psf_cache

README = Path(__file__).resolve().parents[1] / "README.md"

FAST = ('"survey=quick", "survey.width_arcsec=8", "survey.height_arcsec=8", '
        '"telescope.psf.spike_radius_arcsec=2.0", "telescope.psf.core_radius_arcsec=1.0", '
        '"score.report=false", "selection=none", "workers=1", '
        # the field-dependent PSF and the drift: extra PSFs per band, tested in
        # tests/test_field_psf.py and tests/test_drift.py
        '"telescope.field_psf.enabled=false", "telescope.drift.enabled=false"')


def _from_python_block() -> str:
    text = README.read_text()
    section = text.split("## From Python", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, re.S)
    assert len(blocks) == 1, "one python block expected under 'From Python'"
    return blocks[0]


def test_from_python_block_is_self_contained():
    code = _from_python_block()
    assert "/path/to" not in code  # no placeholder to edit before it runs
    assert "CONF_DIR" in code


def test_from_python_example_runs(tmp_path):
    code = _from_python_block()
    assert 'overrides=["survey=quick"]' in code and '"outputs/notebook_run"' in code
    out = tmp_path / "notebook_run"
    # the session's PSF cache (tests/conftest.py), not the user's: the PSFs of other tests'
    # small fields are read back instead of computed again
    code = code.replace('overrides=["survey=quick"]', f"overrides=[{FAST}, "
                        f'"telescope.psf.cache_dir={shared_psf_cache()}"]')
    code = code.replace('"outputs/notebook_run"', repr(str(out)))
    namespace: dict = {}
    exec(compile(code, str(README), "exec"), namespace)
    result = namespace["result"]
    assert (out / "COMPLETE").is_file()
    depth = result.summary["depth_ab"]
    assert set(depth) == {b.name for b in namespace["sc"].telescope.bands}
    assert all(20 < d["predicted_5sigma"] < 35 for d in depth.values())
