"""The help pages of simfield's commands.

Source of the expected presets: the shipped configuration folder itself (simfield.config.CONF_DIR,
listed here with pathlib, not through simfield._help), so a preset added there and missing from
``simfield --help`` fails. Argparse's documented ``%(default)s`` help expansion (Python
standard library documentation, argparse) is what "every default shown" means for the other
commands.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from simfield.config import CONF_DIR


def _run(tmp_path, *args, entry="main"):
    env = dict(os.environ, XDG_CACHE_HOME=str(tmp_path / "cache"), COLUMNS="100")
    return subprocess.run([sys.executable, "-c", f"from simfield.cli import {entry}; {entry}()",
                           *args], cwd=tmp_path, capture_output=True, text=True, env=env,
                          timeout=120)


def _shipped_presets() -> dict[str, list[str]]:
    conf = Path(CONF_DIR)
    out = {d.name: sorted(p.stem for p in d.glob("*.yaml")) for d in conf.iterdir()
           if d.is_dir() and d.name not in ("hydra", "__pycache__")}
    out["hydra/launcher"] = sorted(p.stem for p in (conf / "hydra" / "launcher").glob("*.yaml"))
    return out


@pytest.mark.parametrize("flag", ["--help", "-h"])
def test_simfield_help_lists_every_group_and_preset(tmp_path, flag):
    r = _run(tmp_path, flag)
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""
    text = r.stdout
    assert "== Flags ==" not in text  # not Hydra's stock page
    assert "synthetic deep field" in text and "README" in text and "--hydra-help" in text
    groups = _shipped_presets()
    assert len(groups) >= 10
    for group, presets in groups.items():
        block = re.search(rf"^  {re.escape(group)}:(.*?)(?=^  \S|^\S|\Z)", text, re.M | re.S)
        assert block, f"group {group} missing from simfield --help"
        listed = re.findall(r"^    [*-] (\S+)", block.group(1), re.M)
        assert sorted(listed) == presets, group
    assert re.search(r"^    \* deep\b", text, re.M)  # the default survey is marked
    assert re.search(r"^  seed=1 ", text, re.M) and re.search(r"^  workers=0 ", text, re.M)
    assert "outputs/<date>/<time>/" in text
    assert [p.name for p in tmp_path.iterdir() if p.name != "cache"] == []  # nothing written
    assert not (tmp_path / "cache").exists()


def test_simfield_help_with_overrides_runs_nothing(tmp_path):
    r = _run(tmp_path, "survey=quick", "--help")
    assert r.returncode == 0 and "Configuration groups" in r.stdout
    assert list(tmp_path.iterdir()) == []


def test_hydra_help_still_available(tmp_path):
    r = _run(tmp_path, "--hydra-help")
    assert r.returncode == 0, r.stderr
    assert "--cfg" in r.stdout and "--multirun" in r.stdout
    assert [p.name for p in tmp_path.iterdir() if p.name != "cache"] == []


def _option_helps(text: str) -> dict[str, str]:
    """``{--option: its help text}`` of an argparse page (options section)."""
    out, cur = {}, None
    for line in text.split("options:", 1)[1].splitlines():
        m = re.match(r"^  (-\w, )?(--[\w-]+)(.*)$", line)
        if m:
            cur = m.group(2)
            out[cur] = m.group(3)
        elif cur and line.startswith(" " * 10):
            out[cur] += " " + line.strip()
    out.pop("--help", None)
    return out


@pytest.fixture(scope="module")
def score_help(tmp_path_factory):
    """``simfield-score --help``, run once for the two tests that read it."""
    return _run(tmp_path_factory.mktemp("score_help"), "--help", entry="score_main")


@pytest.mark.parametrize("entry", ["score_main", "inject_main", "collect_main"])
def test_every_option_shows_its_default(tmp_path, entry, request):
    r = request.getfixturevalue("score_help") if entry == "score_main" else \
        _run(tmp_path, "--help", entry=entry)
    assert r.returncode == 0, r.stderr
    helps = _option_helps(r.stdout)
    assert helps
    for opt, text in helps.items():
        assert "default" in text.lower(), f"{entry} {opt} shows no default: {text!r}"
    assert "``" not in r.stdout and ":func:" not in r.stdout  # plain text, no reST markup


def test_score_help_states_radius_and_flux_unit_defaults(score_help):
    helps = _option_helps(score_help.stdout)
    assert "default: nJy" in helps["--flux-unit"]
    assert "match_radius_arcsec" in helps["--radius"] and "default" in helps["--radius"]
    assert "default: ra" in helps["--ra-col"] and "default: dec" in helps["--dec-col"]
    assert "default: mag" in helps["--mag-col"]


def test_help_page_reads_presets_at_run_time(tmp_path):
    """A preset added to a copy of conf/ appears on the page with its first comment line."""
    import shutil

    from simfield._help import help_page

    conf = tmp_path / "conf"
    shutil.copytree(CONF_DIR, conf)
    (conf / "survey" / "wide_test.yaml").write_text("# A wide test field. More text.\nname: w\n")
    text = help_page(conf)
    assert re.search(r"^    - wide_test  A wide test field$", text, re.M)
    assert "wide_test" not in help_page(CONF_DIR)
