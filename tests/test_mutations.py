"""Corruption is caught: random byte changes, truncations and deletions anywhere in a built dataset
fail verification; hostile manifests and paths leading outside are refused; malformed Arrow files
read without verification raise our errors, never a crash or wrongly shaped data."""

from __future__ import annotations

import json
import os
import random
import shutil
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from conftest import REPO, build_dir, full_tests, skip_unless_full, write_project

from seqpipe._verify import listed_files, verify
from seqpipe.dataset import Dataset, open_dataset
from seqpipe.errors import DatasetError, ManifestError, SeqpipeError, ShardCorruptError, UnsafePathError
from seqpipe.manifest import MANIFEST_NAME, dumps, seal

HOSTILE = REPO / "fixtures" / "manifests"
CASES: dict[str, dict[str, Any]] = json.loads((HOSTILE / "cases.json").read_text())
FULL_MUTATIONS = 1000
SAMPLE_MUTATIONS = 300


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A tiny dataset (a dozen shards, three docs tables, a vocabulary); tests restore what they change."""
    root = tmp_path_factory.mktemp("tiny")
    return build_dir(write_project(root / "src", files=2, paragraphs=15, shard_tokens=150), root / "dataset")


@pytest.fixture
def dataset(tiny: Path, tmp_path: Path) -> Path:
    """A private copy of the tiny dataset."""
    return Path(shutil.copytree(tiny, tmp_path / "dataset", symlinks=True))


def manifest_of(d: Path) -> dict[str, Any]:
    return dict(json.loads((d / MANIFEST_NAME).read_text()))


def reseal(d: Path, edit: Callable[[dict[str, Any]], None]) -> None:
    """Edit the manifest and seal it again, so its own hashes cannot catch the edit."""
    m = manifest_of(d)
    edit(m)
    (d / MANIFEST_NAME).write_text(dumps(seal(m)))


@contextmanager
def replaced(path: Path, data: bytes | None) -> Iterator[None]:
    """``path`` holds ``data`` (None: is removed) inside the block, its old bytes after it."""
    original = path.read_bytes()
    if data is None:
        path.unlink()
    else:
        path.write_bytes(data)
    try:
        yield
    finally:
        path.write_bytes(original)


# -- random mutations --------------------------------------------------------------------------------
def mutate(rnd: random.Random, raw: bytes) -> tuple[str, bytes | None]:
    """One random single-byte change, truncation, deletion of a byte run, or removal of the file."""
    kind = rnd.choices(["byte", "truncate", "delete", "remove"], weights=[50, 20, 25, 5])[0]
    if kind == "remove" or not raw:
        return "remove", None
    pos = rnd.randrange(len(raw))
    if kind == "byte":
        return f"byte {pos}", raw[:pos] + bytes([raw[pos] ^ rnd.randrange(1, 256)]) + raw[pos + 1 :]
    if kind == "truncate":
        return f"truncate to {pos}", raw[:pos]
    run = rnd.randint(1, min(64, len(raw) - pos))
    return f"delete {run} at {pos}", raw[:pos] + raw[pos + run :]


def same_json(a: bytes, b: bytes | None) -> bool:
    """Whether two manifest texts parse to the same JSON value (whitespace-only edits)."""
    try:
        return b is not None and json.loads(a) == json.loads(b)
    except ValueError:
        return False


def run_mutations(d: Path, count: int, seed: int) -> None:
    m = manifest_of(d)
    groups = {
        "shard": [s["path"] for sp in m["splits"].values() for s in sp["shards"]],
        "documents": [sp["document_table"]["path"] for sp in m["splits"].values()],
        "vocabulary": [f["path"] for f in listed_files(m) if f["path"] == m["vocabulary"]["path"]],
        "manifest": [MANIFEST_NAME],
    }
    assert all(groups.values()) and len(groups["shard"]) >= 5
    rnd = random.Random(seed)
    missed, neutral, done = [], 0, 0
    while done < count:
        rel = rnd.choice(groups[rnd.choice(sorted(groups))])
        path = d / rel
        original = path.read_bytes()
        what, data = mutate(rnd, original)
        if rel == MANIFEST_NAME and same_json(original, data):
            neutral += 1  # same JSON value, other whitespace: see the xfail test below
            continue
        with replaced(path, data):
            report = verify(d)
            try:
                open_dataset(d, verify=True)
                opened = True
            except SeqpipeError:
                opened = False
        if report.ok or opened:
            missed.append(f"{rel}: {what} (verify ok: {report.ok}, opened: {opened})")
        done += 1
    assert not missed, f"{len(missed)} of {count} mutations not detected: {missed[:10]}"
    assert neutral < count // 10  # only a few manifest edits are whitespace-only
    assert verify(d).ok  # every file restored


def test_random_mutations_are_all_detected(tiny: Path) -> None:
    """Random single-byte changes, truncations and deletions of shards, docs tables, vocabulary and
    manifest (1,000 with SEQPIPE_FULL_TESTS=1) all fail verify and verified opening."""
    run_mutations(tiny, FULL_MUTATIONS if full_tests() else SAMPLE_MUTATIONS, seed=11)


def test_manifest_whitespace_edit_is_detected(dataset: Path) -> None:
    """A manifest whose text differs from the written bytes only in whitespace fails verify."""
    path = dataset / MANIFEST_NAME
    path.write_bytes(path.read_bytes().replace(b'  "dtype"', b'\t"dtype"', 1))
    assert not verify(dataset).ok


# -- paths leading outside the dataset ---------------------------------------------------------------
def _move_out(d: Path, rel: str) -> Path:
    """Move a dataset file to ``d/../outside`` (same bytes, same hashes) and return its new place."""
    outside = d.parent / "outside"
    outside.mkdir(exist_ok=True)
    target = outside / Path(rel).name
    shutil.move(str(d / rel), target)
    return target


def _escape_by_path(d: Path, style: str) -> list[str]:
    rel = manifest_of(d)["splits"]["train"]["shards"][0]["path"]
    target = _move_out(d, rel)
    hostile = {
        "absolute": str(target),
        "parent": f"../outside/{target.name}",
        "nested-parent": f"shards/train/../../../outside/{target.name}",
    }[style]
    reseal(d, lambda m: m["splits"]["train"]["shards"][0].update(path=hostile))
    return [hostile]


def _escape_by_symlinked_folder(d: Path) -> list[str]:
    shards = [s["path"] for s in manifest_of(d)["splits"]["train"]["shards"]]
    outside = d.parent / "outside"
    shutil.move(str(d / "shards" / "train"), outside)
    os.symlink(outside, d / "shards" / "train", target_is_directory=True)
    return [*shards, "shards/train"]  # the symlinked folder itself is reported too


def _escape_by_symlinked_file(d: Path) -> list[str]:
    rel = manifest_of(d)["splits"]["train"]["shards"][-1]["path"]
    os.symlink(_move_out(d, rel), d / rel)
    return [rel]


ESCAPES: dict[str, Callable[[Path], list[str]]] = {
    "absolute": lambda d: _escape_by_path(d, "absolute"),
    "parent": lambda d: _escape_by_path(d, "parent"),
    "nested-parent": lambda d: _escape_by_path(d, "nested-parent"),
    "symlinked-shard-folder": _escape_by_symlinked_folder,
    "symlinked-shard-file": _escape_by_symlinked_file,
}


@pytest.mark.parametrize("style", sorted(ESCAPES))
def test_paths_leading_outside_are_refused(dataset: Path, style: str) -> None:
    """A shard reached through an absolute path, '..' or a symlink leading outside the dataset is
    refused by verify ('unsafe', and nothing else is wrong) and by opening the split's stream, even
    with the file's bytes intact and the manifest re-sealed."""
    hostile = ESCAPES[style](dataset)
    report = verify(dataset)
    assert sorted(p.path for p in report.problems) == sorted(hostile)
    assert {p.kind for p in report.problems} == {"unsafe"}
    with pytest.raises(UnsafePathError):
        _ = open_dataset(dataset).split("train").stream
    with pytest.raises(SeqpipeError):
        open_dataset(dataset, verify=True)


def test_symlinked_docs_folder_is_refused(dataset: Path) -> None:
    """A docs folder that is a symlink leading outside is refused when the documents are read."""
    outside = dataset.parent / "outside-docs"
    shutil.move(str(dataset / "documents"), outside)
    os.symlink(outside, dataset / "documents", target_is_directory=True)
    assert {p.kind for p in verify(dataset).problems} == {"unsafe"}
    with pytest.raises(UnsafePathError):
        _ = open_dataset(dataset).split("validation").documents


# -- hostile manifest files (fixtures/manifests, index in cases.json) --------------------------------
KNOWN_BUGS: dict[str, str] = {}  # case name -> reason, for a refusal that does not work yet


def _hostile_params() -> list[Any]:
    return [
        pytest.param(name, marks=pytest.mark.xfail(strict=True, reason=KNOWN_BUGS[name]))
        if name in KNOWN_BUGS
        else name
        for name in sorted(CASES)
    ]


def _access(ds: Dataset, what: str) -> Any:
    if what == "stream":
        return ds.split("train").stream
    if what == "documents":
        return ds.split("train").documents
    return ds.vocabulary


@pytest.mark.parametrize("name", _hostile_params())
def test_hostile_manifest_is_refused(name: str, tmp_path: Path) -> None:
    """Each hostile manifest is refused as its index says: malformed ones by open_dataset
    (ManifestError) and verify ('manifest' problem); sealed ones with unsafe paths by the first
    read of that path (UnsafePathError) and by verify ('unsafe' problem for that path)."""
    case = CASES[name]
    d = tmp_path / "ds"
    d.mkdir()
    shutil.copyfile(HOSTILE / name, d / MANIFEST_NAME)
    if "match" in case:  # a manifest of an older format: nothing to check, every entry refuses it
        for entry in (open_dataset, verify):
            with pytest.raises(ManifestError, match=case["match"]):
                entry(d)
        return
    report = verify(d)  # must report, never raise
    if case["expect"] == "manifest":
        with pytest.raises(ManifestError):
            open_dataset(d)
        assert [p.kind for p in report.problems] == ["manifest"]
        return
    ds = open_dataset(d)  # the manifest itself is well-formed and sealed: only the path is hostile
    with pytest.raises(UnsafePathError):
        _access(ds, case["access"])
    assert any(p.kind == "unsafe" and p.path == case["path"] for p in report.problems), report.problems


@pytest.mark.parametrize(
    "name",
    [
        pytest.param("\x00.arrow", id="nul-byte"),
        pytest.param("x" * 4000 + ".arrow", id="over-long-name"),
        pytest.param("y" * 200 + ".arrow", id="long-but-valid-name"),
    ],
)
def test_paths_the_system_cannot_look_up_are_refused(dataset: Path, name: str) -> None:
    """A re-sealed shard path the operating system cannot look up gives verify a problem for it and
    the stream a DatasetError, never a bare OSError or ValueError."""
    rel = f"shards/train/{name}"
    reseal(dataset, lambda m: m["splits"]["train"]["shards"][0].update(path=rel))
    report = verify(dataset)
    assert any(p.path == rel and p.kind in ("unsafe", "missing") for p in report.problems), report.problems
    with pytest.raises(DatasetError):
        _ = open_dataset(dataset).split("train").stream


def test_oversized_manifest_is_refused_before_reading(tmp_path: Path) -> None:
    """A manifest over the size limit is refused from its size alone (a sparse 65 MiB file)."""
    d = tmp_path / "ds"
    d.mkdir()
    with open(d / MANIFEST_NAME, "wb") as fh:
        fh.truncate(65 << 20)
    with pytest.raises(ManifestError, match="limit"):
        open_dataset(d)
    assert [p.kind for p in verify(d).problems] == ["manifest"]


# -- malformed Arrow files read without verification -------------------------------------------------
def _ipc_file(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    return bytes(sink.getvalue().to_pybytes())


def _ipc_stream(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return bytes(sink.getvalue().to_pybytes())


SHARD_META = {b"seqpipe.table": b"shard", b"seqpipe.format": b"seqpipe.shard/2", b"seqpipe.compression": b"none"}


def _shard_table(ids: pa.Array, name: str = "ids", meta: dict[bytes, bytes] | None = SHARD_META) -> pa.Table:
    return pa.table({name: ids}).replace_schema_metadata(meta)


def _not_utf8_name(raw: bytes) -> bytes:
    assert raw.count(b"ids") == 2  # the schema at the start and in the footer
    return raw.replace(b"ids", b"\x96\x9b\x8c")


BAD_SHARDS: dict[str, Callable[[bytes, int], bytes]] = {
    # name: (original bytes, token count) -> replacement bytes
    "empty": lambda raw, n: b"",
    "zeros": lambda raw, n: bytes(len(raw)),
    "random-bytes": lambda raw, n: random.Random(5).randbytes(len(raw)),
    "magic-only": lambda raw, n: b"ARROW1\x00\x00ARROW1",
    "footer-cut": lambda raw, n: raw[:-10],
    "head-cut": lambda raw, n: raw[16:],
    "json-text": lambda raw, n: b'{"ids": [1, 2, 3]}\n',
    "ipc-stream-format": lambda raw, n: _ipc_stream(_shard_table(pa.array(np.zeros(n, np.uint8)))),
    "other-column": lambda raw, n: _ipc_file(_shard_table(pa.array(np.zeros(n, np.uint8)), name="tokens")),
    "no-metadata": lambda raw, n: _ipc_file(_shard_table(pa.array(np.zeros(n, np.uint8)), meta=None)),
    "wrong-dtype": lambda raw, n: _ipc_file(_shard_table(pa.array(np.zeros(n, np.uint16)))),
    "signed-ids": lambda raw, n: _ipc_file(_shard_table(pa.array(np.zeros(n, np.int8)))),
    "short": lambda raw, n: _ipc_file(_shard_table(pa.array(np.zeros(n - 1, np.uint8)))),
    "long": lambda raw, n: _ipc_file(_shard_table(pa.array(np.zeros(n + 1, np.uint8)))),
    "nulls": lambda raw, n: _ipc_file(_shard_table(pa.array([0] * (n - 1) + [None], pa.uint8()))),
    "two-columns": lambda raw, n: _ipc_file(
        pa.table({"ids": np.zeros(n, np.uint8), "x": np.zeros(n, np.uint8)}).replace_schema_metadata(SHARD_META)
    ),
    "name-not-utf8": lambda raw, n: _not_utf8_name(raw),
}
SHARD_BUGS: dict[str, str] = {}  # case name -> reason, for a refusal that does not work yet


def _read_all(d: Path) -> None:
    """Everything a training job reads, without verification."""
    ds = open_dataset(d)
    _ = ds.vocabulary
    for name in ds.splits:
        stream = ds.split(name).stream
        if len(stream):
            stream.slice(0, len(stream))


@pytest.mark.parametrize(
    "case",
    [
        pytest.param(c, marks=pytest.mark.xfail(strict=True, reason=SHARD_BUGS[c])) if c in SHARD_BUGS else c
        for c in sorted(BAD_SHARDS)
    ],
)
def test_malformed_shard_raises_shard_corrupt(tiny: Path, case: str) -> None:
    """A malformed or wrongly shaped shard, read without verification, raises ShardCorruptError."""
    info = manifest_of(tiny)["splits"]["train"]["shards"][1]
    path = tiny / info["path"]
    raw = path.read_bytes()
    with replaced(path, BAD_SHARDS[case](raw, info["tokens"])), pytest.raises(ShardCorruptError):
        _read_all(tiny)


def test_truncated_shard_raises_shard_corrupt(tiny: Path) -> None:
    """A shard cut to any length (a sample from every region of the file) raises ShardCorruptError."""
    path = tiny / manifest_of(tiny)["splits"]["train"]["shards"][0]["path"]
    raw = path.read_bytes()
    lengths = sorted({*range(0, 80), *range(80, len(raw) - 80, 23), *range(len(raw) - 80, len(raw))})
    for n in lengths:
        with replaced(path, raw[:n]), pytest.raises(ShardCorruptError):
            _read_all(tiny)


def _docs_other_columns(raw: bytes, n: int) -> bytes:
    return _ipc_file(pa.table({"begin": pa.array(np.zeros(n, np.int64)), "length": np.ones(n, np.int64)}))


def _vocab_nulls(raw: bytes, n: int) -> bytes:
    table = pa.ipc.open_file(pa.py_buffer(raw)).read_all()
    counts = pa.array([None] * table.num_rows, pa.int64())
    reserved = pa.array([True] * 4 + [None] * (table.num_rows - 4), pa.bool_())
    return _ipc_file(table.set_column(1, "count", counts).set_column(2, "reserved", reserved))


TABLE_CASES: dict[str, tuple[str, Callable[[bytes, int], bytes]]] = {
    "docs-truncated": ("documents", lambda raw, n: raw[: len(raw) // 2]),
    "docs-other-columns": ("documents", _docs_other_columns),
    "docs-empty": ("documents", lambda raw, n: b""),
    "vocabulary-truncated": ("vocabulary", lambda raw, n: raw[:-30]),
    "vocabulary-zeros": ("vocabulary", lambda raw, n: bytes(len(raw))),
    "vocabulary-nulls": ("vocabulary", _vocab_nulls),
}
TABLE_BUGS: dict[str, str] = {}  # case name -> reason, for a refusal that does not work yet


@pytest.mark.parametrize(
    "case",
    [
        pytest.param(c, marks=pytest.mark.xfail(strict=True, reason=TABLE_BUGS[c])) if c in TABLE_BUGS else c
        for c in sorted(TABLE_CASES)
    ],
)
def test_malformed_tables_raise_dataset_errors(tiny: Path, case: str) -> None:
    """A malformed docs table or vocabulary, read without verification, raises a DatasetError
    (ShardCorruptError for unreadable or wrongly typed files), never another exception."""
    which, make = TABLE_CASES[case]
    m = manifest_of(tiny)
    rel = m["splits"]["train"]["document_table"]["path"] if which == "documents" else m["vocabulary"]["path"]
    path = tiny / rel
    with replaced(path, make(path.read_bytes(), m["splits"]["train"]["documents"])), pytest.raises(DatasetError):
        _read_all(tiny)


@pytest.mark.slow
def test_every_byte_flip_read_unverified_is_ours_or_well_shaped(tiny: Path, request: pytest.FixtureRequest) -> None:
    """Flipping any one byte of a shard, a docs table or the vocabulary and reading without
    verification raises a SeqpipeError or gives a stream of the manifest's length and dtype."""
    skip_unless_full(request)
    m = manifest_of(tiny)
    escaped = []
    for rel in (
        m["splits"]["train"]["shards"][0]["path"],
        m["splits"]["train"]["document_table"]["path"],
        m["vocabulary"]["path"],
    ):
        path = tiny / rel
        raw = path.read_bytes()
        for pos in range(len(raw)):
            flipped = raw[:pos] + bytes([raw[pos] ^ 0xFF]) + raw[pos + 1 :]
            with replaced(path, flipped), warnings.catch_warnings():
                warnings.simplefilter("error")
                try:
                    ds = open_dataset(tiny)
                    _ = ds.vocabulary
                    stream = ds.split("train").stream
                    assert len(stream) == m["splits"]["train"]["tokens"]
                    assert stream.dtype == np.dtype(m["dtype"])
                except SeqpipeError:
                    pass
                except Exception as exc:  # collect every kind that escapes
                    escaped.append(f"{rel} byte {pos}: {type(exc).__name__}: {exc}"[:200])
    assert not escaped, escaped[:10]
