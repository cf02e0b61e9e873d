"""verify finds the same problems in a dataset wherever it lies: each damage case runs on a local
directory, a ``file://`` URI and a URI on pyarrow's in-memory filesystem, and must give the same
list of (path, kind) on each."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pyarrow.fs as pafs
import pytest
from conftest import build_dir, write_project

from seqpipe import filesystem
from seqpipe._verify import check_file, listed_files, verify
from seqpipe.manifest import MANIFEST_NAME, dumps, seal
from seqpipe.storage import LocalStore, Store, UriStore

# pyarrow's in-memory filesystem for its own tests (pyarrow._fs._MockFileSystem in the installed pyarrow)
MockFileSystem = getattr(pytest.importorskip("pyarrow._fs"), "_MockFileSystem", None)
MEM = "memverify://bucket"

STORES = [
    "local",
    "file-uri",
    pytest.param("memory-uri", marks=pytest.mark.skipif(MockFileSystem is None, reason="no _MockFileSystem")),
]


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small built dataset (several shards per split), never changed by a test."""
    root = tmp_path_factory.mktemp("built")
    return build_dir(write_project(root / "src", files=2, paragraphs=12, shard_tokens=200), root / "dataset")


def dataset_files(directory: Path) -> dict[str, bytes]:
    """Every file of a local dataset, the private area left out."""
    return {
        p.relative_to(directory).as_posix(): p.read_bytes()
        for p in sorted(directory.rglob("*"))
        if p.is_file() and p.relative_to(directory).parts[0] != ".seqpipe"
    }


@pytest.fixture
def mem() -> Iterator[pafs.FileSystem]:
    fs = MockFileSystem()
    filesystem.register_filesystem(MEM, fs)
    yield fs
    filesystem.clear_filesystems()


@pytest.fixture(params=STORES)
def store(request: pytest.FixtureRequest, built: Path, tmp_path: Path) -> Store:
    """A copy of the built dataset in the store the parameter names (its files put in place with
    each backend's own calls, not through the store)."""
    files = dataset_files(built)
    if request.param == "memory-uri":
        fs = request.getfixturevalue("mem")
        for rel, data in files.items():
            fs.create_dir(("sets/ds/" + rel).rpartition("/")[0], recursive=True)
            with fs.open_output_stream("sets/ds/" + rel) as sink:
                sink.write(data)
        return UriStore(MEM + "/sets/ds")
    directory = tmp_path / "ds"
    for rel, data in files.items():
        (directory / rel).parent.mkdir(parents=True, exist_ok=True)
        (directory / rel).write_bytes(data)
    if request.param == "file-uri":
        return UriStore("file://" + directory.resolve().as_posix())
    return LocalStore(directory)


def manifest_of(store: Store) -> dict[str, Any]:
    return dict(json.loads(store.read_manifest()))


def shard(store: Store, index: int = 1) -> str:
    return str(manifest_of(store)["splits"]["train"]["shards"][index]["path"])


def reseal(store: Store, edit: Callable[[dict[str, Any]], None]) -> None:
    """Edit the manifest and seal it again, so its own hashes cannot catch the edit."""
    m = manifest_of(store)
    edit(m)
    store.write_bytes(MANIFEST_NAME, dumps(seal(m)).encode("ascii"))


def flip_a_byte(store: Store, rel: str) -> None:
    with store.open(rel) as stream:
        data = bytearray(stream.read())
    data[len(data) // 2] ^= 0x01
    store.write_bytes(rel, bytes(data))


def cut(store: Store, rel: str, keep: int) -> None:
    with store.open(rel) as stream:
        store.write_bytes(rel, stream.read()[:keep])


# each case damages the dataset through the store and returns the (path, kind) list verify must give
def _intact(store: Store) -> list[tuple[str, str]]:
    return []


def _corrupt(store: Store) -> list[tuple[str, str]]:
    flip_a_byte(store, shard(store))
    return [(shard(store), "corrupt")]


def _grown(store: Store) -> list[tuple[str, str]]:
    rel = manifest_of(store)["vocabulary"]["path"]
    with store.open(rel) as stream:
        store.write_bytes(rel, stream.read() + b"\x00")
    return [(rel, "corrupt")]


def _truncated(store: Store) -> list[tuple[str, str]]:
    cut(store, shard(store), 10)
    return [(shard(store), "truncated")]


def _missing(store: Store) -> list[tuple[str, str]]:
    rel = manifest_of(store)["splits"]["train"]["document_table"]["path"]
    store.delete(rel)
    return [(rel, "missing")]


def _unlisted(store: Store) -> list[tuple[str, str]]:
    store.write_bytes("shards/train/999999.arrow", b"stray")
    store.write_bytes("documents/extra/notes.arrow", b"stray")
    store.write_bytes("notes/todo.txt", b"stray")
    store.write_bytes("README.txt", b"stray")
    return [
        ("README.txt", "unlisted"),
        ("notes", "unlisted"),
        ("documents/extra/notes.arrow", "unlisted"),
        ("shards/train/999999.arrow", "unlisted"),
    ]


def _unsafe(store: Store) -> list[tuple[str, str]]:
    reseal(store, lambda m: m["splits"]["train"]["shards"][0].update(path="../outside/000000.arrow"))
    # the file the manifest no longer names is left behind: unlisted
    return [("../outside/000000.arrow", "unsafe"), ("shards/train/000000.arrow", "unlisted")]


def _no_manifest(store: Store) -> list[tuple[str, str]]:
    store.delete(MANIFEST_NAME)
    return [(MANIFEST_NAME, "manifest")]


def _edited_manifest_layout(store: Store) -> list[tuple[str, str]]:
    store.write_bytes(MANIFEST_NAME, store.read_manifest().replace(b'  "dtype"', b'\t"dtype"', 1))
    return [(MANIFEST_NAME, "manifest")]


def _resealed_hash(store: Store) -> list[tuple[str, str]]:
    rel = shard(store, 0)
    reseal(store, lambda m: m["splits"]["train"]["shards"][0].update(hash="0" * 32))
    return [(rel, "corrupt")]


CASES: dict[str, Callable[[Store], list[tuple[str, str]]]] = {
    "intact": _intact,
    "corrupt": _corrupt,
    "grown": _grown,
    "truncated": _truncated,
    "missing": _missing,
    "unlisted": _unlisted,
    "unsafe": _unsafe,
    "no-manifest": _no_manifest,
    "edited-manifest-layout": _edited_manifest_layout,
    "resealed-hash": _resealed_hash,
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_verify_reports_each_damage_alike_on_every_store(store: Store, case: str) -> None:
    """Each damage gives exactly the expected problems, in order, whatever the store; an intact
    dataset gives none and every listed file counted."""
    want = CASES[case](store)
    report = verify(store)
    assert [(p.path, p.kind) for p in report.problems] == want, report.problems
    assert report.ok is (not want)
    assert report.directory == store.location
    if case == "intact":
        m = manifest_of(store)
        assert report.fingerprint == m["fingerprint"]
        assert report.files_checked == len(listed_files(m))
        assert report.bytes_checked == sum(e["bytes"] for e in listed_files(m))


def test_verify_by_location_equals_verify_of_the_store(store: Store) -> None:
    """verify(path or URI) and verify(Store) give the same report."""
    _unlisted(store)
    location = store.directory if isinstance(store, LocalStore) else store.location
    assert verify(location).to_dict() == verify(store).to_dict()


def test_one_thread_and_many_give_the_same_report(store: Store) -> None:
    """The thread count changes how files are hashed, never what is found."""
    _corrupt(store)
    _missing(store)
    assert verify(store, threads=1).to_dict() == verify(store, threads=4).to_dict()


def test_check_file_reports_what_it_read(store: Store) -> None:
    """check_file gives the bytes it hashed and no problem for an intact file; a missing one reads nothing."""
    entry = listed_files(manifest_of(store))[0]
    assert check_file(store, entry) == (entry["bytes"], None)
    size, problem = check_file(store, {**entry, "path": "shards/none.arrow"})
    assert size == 0 and problem is not None and problem.kind == "missing"


def test_expect_and_against_work_over_a_uri(store: Store, tmp_path: Path) -> None:
    """--expect and --against compare the stored manifest whatever the store."""
    m = manifest_of(store)
    committed = tmp_path / "committed.json"
    committed.write_bytes(store.read_manifest())
    assert verify(store, against=committed, expect=m["fingerprint"].upper()).ok
    report = verify(store, expect="0" * 32)
    assert [(p.path, p.kind) for p in report.problems] == [(MANIFEST_NAME, "mismatch")]
