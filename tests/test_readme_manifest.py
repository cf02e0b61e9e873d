"""The README's manifest description is enough to check a dataset: its checking code, which uses
only json, pyarrow and xxhash, accepts a built dataset and catches what verify catches."""

from __future__ import annotations

import json
import re
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from conftest import build_dir, write_project

from seqpipe.manifest import MANIFEST_NAME, dumps, seal

README = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")


def readme_checker() -> Callable[[Path], str]:
    """``check_dataset`` from the README's code block, run as written in a namespace of its own."""
    (code,) = [b for b in re.findall(r"```python\n(.*?)```", README, flags=re.S) if "def check_dataset" in b]
    imported = re.findall(r"^\s*(?:import|from)\s+(\w+)", code, flags=re.M)
    assert set(imported) <= {"json", "pathlib", "pyarrow", "xxhash"}, imported  # no seqpipe in the checker
    namespace: dict[str, Any] = {}
    exec(compile(code, "README.md", "exec"), namespace)  # the README's own code, as a reader runs it
    checker: Callable[[Path], str] = namespace["check_dataset"]
    return checker


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A dataset with several shards per split, built once for the module."""
    root = tmp_path_factory.mktemp("readme-manifest")
    return build_dir(write_project(root / "src", files=3, paragraphs=20, shard_tokens=200), root / "dataset")


@pytest.fixture
def copy(built: Path, tmp_path: Path) -> Path:
    """A private copy of the built dataset."""
    return Path(shutil.copytree(built, tmp_path / "dataset"))


def test_readme_checker_accepts_a_built_dataset(built: Path) -> None:
    """The README's checker passes on a fresh dataset (several shards, all splits) and returns its fingerprint."""
    manifest = json.loads((built / MANIFEST_NAME).read_text())
    assert sum(len(sp["shards"]) for sp in manifest["splits"].values()) >= 4
    assert readme_checker()(built) == manifest["fingerprint"]


def _flip_last_byte(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[-1] ^= 0x01
    path.write_bytes(bytes(data))


def _hand_edit(path: Path) -> None:
    path.write_text(path.read_text().replace('"tokens": ', '"tokens": 1', 1))


def _reseal(d: Path, edit: Callable[[dict[str, Any]], None]) -> None:
    m = json.loads((d / MANIFEST_NAME).read_text())
    edit(m)
    (d / MANIFEST_NAME).write_text(dumps(seal(m)))


@pytest.mark.parametrize(
    "damage",
    [
        pytest.param(lambda d: _flip_last_byte(d / "shards" / "train" / "000000.arrow"), id="shard-byte"),
        pytest.param(lambda d: _flip_last_byte(d / "documents" / "train.arrow"), id="documents-byte"),
        pytest.param(lambda d: _flip_last_byte(d / "vocab.arrow"), id="vocabulary-byte"),
        pytest.param(lambda d: _hand_edit(d / MANIFEST_NAME), id="manifest-edited"),
        pytest.param(lambda d: _reseal(d, lambda m: m["recipe"].update(extra=1)), id="recipe-edited-resealed"),
        pytest.param(
            lambda d: _reseal(d, lambda m: m["splits"]["train"]["shards"][1].update(first_token=1)),
            id="tiling-resealed",
        ),
        pytest.param(
            lambda d: _reseal(d, lambda m: m["splits"]["train"]["shards"][0].update(token_hash="0" * 32)),
            id="token-hash-resealed",
        ),
    ],
)  # fmt: skip
def test_readme_checker_catches_damage(copy: Path, damage: Callable[[Path], None]) -> None:
    """Each kind of damage (a file's bytes, a hand edit, a re-sealed inconsistency) fails the README's checker."""
    damage(copy)
    with pytest.raises(AssertionError):
        readme_checker()(copy)
