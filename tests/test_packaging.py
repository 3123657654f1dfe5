"""A built wheel holds every module and every configuration file, and runs from anywhere."""

from __future__ import annotations

import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    """The project's wheel, built by pip from a copy of the sources (the tree stays clean)."""
    src = tmp_path_factory.mktemp("src")
    for name in ("simfield", "conf"):
        shutil.copytree(ROOT / name, src / name, ignore=shutil.ignore_patterns("__pycache__"))
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    out = tmp_path_factory.mktemp("wheel")
    r = subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "-w", str(out),
                        str(src)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    (path,) = out.glob("simfield-*.whl")
    return path


@pytest.mark.slow
def test_wheel_holds_every_module_and_config_file(wheel):
    """Every simfield/**/*.py and every conf/**/*.yaml (as simfield/conf/...) is in the wheel."""
    names = set(zipfile.ZipFile(wheel).namelist())
    modules = {str(p.relative_to(ROOT)) for p in (ROOT / "simfield").rglob("*.py")}
    configs = {"simfield/conf/" + str(p.relative_to(ROOT / "conf"))
               for p in (ROOT / "conf").rglob("*.yaml")}
    assert len(configs) > 15
    assert not modules - names, \
        f"{sorted(modules - names)}: list their package in [tool.setuptools] packages"
    assert not configs - names, sorted(configs - names)


@pytest.mark.slow
def test_unpacked_wheel_runs_from_another_directory(wheel, tmp_path):
    """The wheel's package, first on the path, finds its configuration from any directory:
    --cfg job and --estimate work from an empty folder and write nothing there."""
    site, cwd = tmp_path / "site", tmp_path / "elsewhere"
    cwd.mkdir()
    zipfile.ZipFile(wheel).extractall(site)
    boot = (f"import sys; sys.path.insert(0, {str(site)!r}); import simfield; "
            f"assert simfield.__file__.startswith({str(site)!r}), simfield.__file__; "
            "from simfield.cli import main; main()")
    for args, expect in ((["--cfg", "job", "survey=quick"], "name: quick"),
                         (["--estimate", "survey=quick"], "peak memory: ")):
        r = subprocess.run([sys.executable, "-c", boot, *args], cwd=cwd, capture_output=True,
                           text=True, timeout=120)
        assert r.returncode == 0 and expect in r.stdout, r.stderr[-2000:]
    assert not any(cwd.iterdir())
