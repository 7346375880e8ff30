"""The installable package: a built wheel carries every module of ``forecasting``.

A non-editable ``pip install .`` installs only what the wheel holds, so a
subpackage the build does not find (``forecasting.engines`` once) is missing
for every user who installs that way, while the tests, run from the checkout,
still pass. This test builds the wheel from a copy of the project and compares
its file list with the package folders on disk.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "forecasting"


def source_modules() -> set[str]:
    """Every .py file of the package, as a path inside the wheel."""
    return {
        path.relative_to(ROOT).as_posix()
        for path in PACKAGE.rglob("*.py")
        if "__pycache__" not in path.parts
    }


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    work = tmp_path_factory.mktemp("build")
    source = work / "source"
    # A copy, so the build's own folders (build/, *.egg-info) never land in the checkout.
    shutil.copytree(ROOT, source, ignore=shutil.ignore_patterns(
        ".git", "__pycache__", "*.egg-info", "build", ".venv", "venv", ".pytest_cache", ".hypothesis",
        "bench", "docs", "tests"))
    out = work / "wheels"
    # --no-build-isolation: build with the setuptools of this environment (requirements-dev.txt),
    # so the test needs no network.
    subprocess.run([sys.executable, "-m", "pip", "wheel", str(source), "--no-deps", "--no-build-isolation",
                    "--quiet", "--wheel-dir", str(out)], check=True, capture_output=True, text=True)
    (built,) = out.glob("forecasting-*.whl")
    return built


def test_the_wheel_carries_every_module_of_the_package(wheel):
    with zipfile.ZipFile(wheel) as archive:
        shipped = {name for name in archive.namelist() if name.endswith(".py")}
    assert shipped == source_modules()


def test_every_subpackage_folder_is_in_the_wheel(wheel):
    folders = {path.parent.relative_to(ROOT).as_posix() for path in PACKAGE.rglob("__init__.py")}
    assert {"forecasting", "forecasting/cli", "forecasting/engines"} <= folders
    with zipfile.ZipFile(wheel) as archive:
        shipped = {name.rsplit("/", 1)[0] for name in archive.namelist() if name.endswith("/__init__.py")}
    assert shipped == folders


def _names_in(requirements: str) -> set[str]:
    """The package names a requirements file lists (extras and ranges dropped)."""
    names = set()
    for line in (ROOT / requirements).read_text().splitlines():
        line = line.split("#", 1)[0].strip()
        if line:
            names.add(line.split(">")[0].split("<")[0].split("=")[0].split("[")[0].strip().lower())
    return names


def _required_by(wheel: Path) -> list[tuple[str, str]]:
    """``(package name, environment marker)`` of every Requires-Dist line of the wheel's metadata."""
    with zipfile.ZipFile(wheel) as archive:
        (metadata,) = [n for n in archive.namelist() if n.endswith(".dist-info/METADATA")]
        text = archive.read(metadata).decode()
    found = []
    for line in text.splitlines():
        if line.startswith("Requires-Dist:"):
            spec, _, marker = line.split(":", 1)[1].partition(";")
            name = spec.strip().split("<")[0].split(">")[0].split("=")[0].split("[")[0].strip().lower()
            found.append((name, marker.strip()))
    return found


def test_the_wheel_asks_for_the_runtime_requirements(wheel):
    # The library's ranges come from requirements.txt, the one list of them.
    required = {name for name, marker in _required_by(wheel) if not marker}
    assert _names_in("requirements.txt") and required == _names_in("requirements.txt")


def test_the_scale_extra_asks_for_the_cluster_engine(wheel):
    # pip install ".[scale]" brings the dask engine, as requirements-scale.txt lists it; duckdb is a
    # runtime requirement (every install has --engine duckdb).
    extra = {name for name, marker in _required_by(wheel) if "extra" in marker and "scale" in marker}
    assert {"dask", "distributed"} <= extra and "duckdb" in _names_in("requirements.txt")
    assert extra == _names_in("requirements-scale.txt")
