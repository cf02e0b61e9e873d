"""The package as built: the wheel carries py.typed and the licence; the sdist carries fixtures/,
tests/ and scripts/, and pytest collects every test module from the unpacked sdist."""

from __future__ import annotations

import importlib.util
import os
import shutil
import subprocess
import sys
import tarfile
import zipfile
from pathlib import Path

import pytest
from conftest import REPO

from seqpipe import __version__

pytestmark = pytest.mark.skipif(
    importlib.util.find_spec("build") is None, reason="needs the 'build' package (pip install build)"
)

# What a source copy leaves out: version control, environments and what earlier builds left.
_NOT_SOURCE = shutil.ignore_patterns(
    ".git", ".venv", "build", "dist", "*.egg-info", "__pycache__", ".*_cache", ".hypothesis", "out", "demo-out"
)


@pytest.fixture(scope="module")
def dist(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The sdist and the wheel built from it, from a copy of the source tree (building in place
    would leave build/ and *.egg-info in the checkout)."""
    root = tmp_path_factory.mktemp("packaging")
    source = Path(shutil.copytree(REPO, root / "source", ignore=_NOT_SOURCE))
    out = root / "dist"
    done = subprocess.run(
        [sys.executable, "-m", "build", "--no-isolation", "--outdir", str(out), str(source)],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    return out


def test_wheel_holds_py_typed_the_licence_and_the_version(dist: Path) -> None:
    """The wheel is named for ``seqpipe.__version__`` (the one place the version lives) and lists
    seqpipe/py.typed, the LICENSE and seqpipe/__main__.py."""
    (wheel,) = dist.glob("*.whl")
    assert wheel.name.startswith(f"seqpipe-{__version__}-")
    names = set(zipfile.ZipFile(wheel).namelist())
    assert "seqpipe/py.typed" in names and "seqpipe/__main__.py" in names
    assert f"seqpipe-{__version__}.dist-info/licenses/LICENSE" in names
    metadata = zipfile.ZipFile(wheel).read(f"seqpipe-{__version__}.dist-info/METADATA").decode()
    assert f"Version: {__version__}\n" in metadata and "License-Expression: MIT" in metadata


def test_sdist_carries_the_tests_and_they_collect(dist: Path, tmp_path: Path) -> None:
    """The unpacked sdist holds LICENSE, fixtures/, tests/ and scripts/ as in the checkout, and
    ``pytest --collect-only`` there imports every test module without an error."""
    (sdist,) = dist.glob("*.tar.gz")
    with tarfile.open(sdist) as archive:
        archive.extractall(tmp_path, filter="data")
    unpacked = tmp_path / f"seqpipe-{__version__}"
    assert (unpacked / "LICENSE").is_file() and (unpacked / "seqpipe" / "py.typed").is_file()
    for folder in ("fixtures", "tests", "scripts"):
        want = {p.relative_to(REPO) for p in (REPO / folder).rglob("*") if p.is_file() and "__pycache__" not in p.parts}
        have = {p.relative_to(unpacked) for p in (unpacked / folder).rglob("*") if p.is_file()}
        assert want <= have, sorted(map(str, want - have))[:5]
    env = {**os.environ, "PYTHONPATH": str(unpacked)}
    done = subprocess.run(
        [sys.executable, "-m", "pytest", "--collect-only", "-q", "-p", "no:cacheprovider", "tests"],
        capture_output=True,
        text=True,
        cwd=unpacked,
        env=env,
        timeout=300,
    )
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    modules = {line.split("::")[0] for line in done.stdout.splitlines() if "::" in line}
    assert modules == {f"tests/{p.name}" for p in (REPO / "tests").glob("test_*.py")}
