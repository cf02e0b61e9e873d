"""Hostile files never crash a reader: crafted Arrow sources and shards, extreme numbers in inputs
and recipes, deeply nested JSON and TOML, FIFOs, and ids outside the vocabulary all end with the
exit code the README gives for their kind and a message, never a signal or an internal error (70).

A case that could kill the interpreter (a read outside a memory map) runs in a child process, so a
signal is a failing test, not a dead test run."""

from __future__ import annotations

import json
import os
import shutil
import struct
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from conftest import REPO, build_dir, run_cli, write_project

from seqpipe import open_dataset
from seqpipe._verify import verify
from seqpipe.cli import main
from seqpipe.errors import ManifestError, UnsafePathError
from seqpipe.manifest import MANIFEST_NAME, dumps, seal

HOSTILE = REPO / "fixtures" / "hostile"
EXIT_INPUT, EXIT_DATASET, EXIT_USAGE = 3, 4, 2


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A tiny built dataset (uint8 ids, several train shards); tests work on copies."""
    root = tmp_path_factory.mktemp("tiny")
    return build_dir(write_project(root / "src", files=2, paragraphs=15, shard_tokens=150), root / "dataset")


@pytest.fixture
def dataset(tiny: Path, tmp_path: Path) -> Path:
    """A private copy of the tiny dataset."""
    return Path(shutil.copytree(tiny, tmp_path / "dataset", symlinks=True))


def _manifest(d: Path) -> dict[str, object]:
    return dict(json.loads((d / MANIFEST_NAME).read_text()))


def _first_shard(d: Path, index: int = 0) -> tuple[Path, int]:
    info = _manifest(d)["splits"]["train"]["shards"][index]  # type: ignore[index]
    return d / info["path"], int(info["tokens"])


def _in_child(code: str, *args: str) -> subprocess.CompletedProcess[str]:
    """Run ``code`` in a fresh interpreter (a crash there is a return code, not a dead test run)."""
    env = {k: v for k, v in os.environ.items() if k != "SEQPIPE_DEBUG"}
    return subprocess.run(
        [sys.executable, "-c", code, *args], capture_output=True, text=True, timeout=120, env=env, cwd=REPO
    )


READ_ALL = """
import sys
from seqpipe import open_dataset
from seqpipe.errors import SeqpipeError
try:
    ds = open_dataset(sys.argv[1])
    _ = ds.vocabulary
    for name in ds.splits:
        s = ds.split(name).stream
        print(int(s.slice(0, len(s)).astype("int64").sum()) if len(s) else 0)
except SeqpipeError as exc:
    print(type(exc).__name__, exc)
    sys.exit(exc.exit_code)
"""


def _patch_int64(raw: bytes, old: int, new: int, which: list[int]) -> bytes:
    """``raw`` with the ``which``-th packed little-endian int64 occurrences of ``old`` set to ``new``."""
    packed = struct.pack("<q", old)
    at = [i for i in range(len(raw) - 7) if raw[i : i + 8] == packed]
    out = bytearray(raw)
    for k in which:
        out[at[k] : at[k] + 8] = struct.pack("<q", new)
    return bytes(out)


def _shard_bytes(ids: np.ndarray) -> bytes:
    meta = {b"seqpipe.table": b"shard", b"seqpipe.format": b"seqpipe.shard/2", b"seqpipe.compression": b"none"}
    table = pa.table({"ids": pa.array(ids)}).replace_schema_metadata(meta)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    return bytes(sink.getvalue().to_pybytes())


# The int64 fields of a one-batch uint8 shard that hold its token count n, in file order:
# record batch length (0), data buffer length (1), field node length (2) (Arrow columnar format,
# "IPC File Format" / Message.fbs; positions checked against pyarrow 26's writer in _shard_fields).
def _shard_fields(n: int) -> bytes:
    raw = _shard_bytes(np.arange(n, dtype=np.uint8) % 7)
    assert raw.count(struct.pack("<q", n)) == 3
    return raw


@pytest.mark.parametrize(
    ("case", "which", "value"),
    [
        pytest.param("buffer-shortened", [1], 8, id="buffer-shortened"),
        pytest.param("rows-1e9", [0, 2], 10**9, id="rows-1e9"),
    ],
)
def test_shard_declaring_more_ids_than_its_buffer_is_corrupt(
    dataset: Path, case: str, which: list[int], value: int
) -> None:
    """A shard whose metadata declares more ids than its data buffer holds (a shortened buffer, or a
    record batch declaring 10**9 rows) is ShardCorruptError (exit 4), never a read past the file."""
    path, n = _first_shard(dataset, -1)
    path.write_bytes(_patch_int64(_shard_fields(n), n, value, which))
    if case == "rows-1e9":  # re-sealed: the manifest agrees with the shard's claim
        m = _manifest(dataset)
        train = m["splits"]["train"]  # type: ignore[index]
        train["shards"][-1]["tokens"] = value
        train["tokens"] += value - n
        (dataset / MANIFEST_NAME).write_text(dumps(seal(m)))
    done = _in_child(READ_ALL, str(dataset))
    assert done.returncode == EXIT_DATASET, (done.returncode, done.stdout, done.stderr)
    assert "ShardCorruptError" in done.stdout


def test_ids_outside_the_vocabulary_are_corrupt(dataset: Path) -> None:
    """A shard holding an id at or past the vocabulary's size is ShardCorruptError when its split is
    opened, and `batches --format text` exits 4 with a message instead of an internal error."""
    path, n = _first_shard(dataset)
    entries = int(_manifest(dataset)["vocabulary"]["entries"])  # type: ignore[index]
    path.write_bytes(_shard_bytes(np.full(n, entries, np.uint8)))
    done = _in_child(READ_ALL, str(dataset))
    assert done.returncode == EXIT_DATASET and "vocabulary has" in done.stdout, (done.stdout, done.stderr)
    out = run_cli(["batches", str(dataset), "--batch-size", "2", "--window", "8", "--limit", "2", "--format", "text"])
    assert out.returncode == EXIT_DATASET and "vocabulary" in out.stderr, (out.returncode, out.stderr)


def test_vocabulary_shorter_than_the_manifest_says_is_corrupt(dataset: Path) -> None:
    """A vocabulary file with fewer entries than the manifest's vocabulary.entries is refused."""
    m = _manifest(dataset)
    m["vocabulary"]["entries"] = int(m["vocabulary"]["entries"]) + 5  # type: ignore[index]
    (dataset / MANIFEST_NAME).write_text(dumps(seal(m)))
    done = _in_child(READ_ALL, str(dataset))
    assert done.returncode == EXIT_DATASET and "entries" in done.stdout, (done.stdout, done.stderr)


# -- sources -----------------------------------------------------------------------------------------
ARROW_RECIPE = """\
[dataset]
name = "hostile"
[[sources]]
kind = "{kind}"
paths = "{path}"
{extra}
[tokenizer]
kind = "words"
"""


def _build_cli(tmp_path: Path, kind: str, name: str, extra: str = "") -> subprocess.CompletedProcess[str]:
    shutil.copyfile(HOSTILE / name, tmp_path / name)
    recipe = tmp_path / "recipe.toml"
    recipe.write_text(ARROW_RECIPE.format(kind=kind, path=name, extra=extra))
    return run_cli(["build", str(recipe), "--out", str(tmp_path / "out"), "--workers", "1", "--quiet"])


@pytest.mark.parametrize("name", ["arrow_huge_offsets.arrow", "arrow_negative_offset.arrow", "arrow_huge_length.arrow"])
def test_crafted_arrow_source_is_an_input_error(tmp_path: Path, name: str) -> None:
    """An Arrow IPC source whose offsets or row count lie is an input error (exit 3) naming the
    file, never a signal (SIGBUS, SIGSEGV) or an internal error."""
    done = _build_cli(tmp_path, "arrow", name, 'field = "text"')
    assert done.returncode == EXIT_INPUT, (done.returncode, done.stderr)
    assert name in done.stderr


@pytest.mark.parametrize("policy", ["error", "skip"])
def test_jsonl_record_with_a_huge_integer_beside_the_text_is_read(tmp_path: Path, policy: str) -> None:
    """A JSON Lines record with a 5,000-digit integer in another field is an ordinary record: both
    lines are read, under either bad-record policy."""
    done = _build_cli(tmp_path, "jsonl", "big_integer.jsonl", f'on_bad_record = "{policy}"')
    assert done.returncode == 0, (done.returncode, done.stderr)
    m = json.loads((tmp_path / "out" / MANIFEST_NAME).read_text())
    assert sum(sp["documents"] for sp in m["splits"].values()) == 2


# -- recipes and verify arguments --------------------------------------------------------------------
def test_vocabulary_cap_beyond_any_integer_type_is_a_recipe_error(tmp_path: Path) -> None:
    """A vocabulary cap of 10**30 is a recipe error (exit 2) with a message, not an overflow."""
    recipe = write_project(tmp_path / "src", files=1, paragraphs=4)
    recipe.write_text(recipe.read_text() + "[vocabulary]\ncap = 1000000000000000000000000000000\n")
    done = run_cli(["build", str(recipe), "--out", str(tmp_path / "out"), "--workers", "1", "--quiet"])
    assert done.returncode == EXIT_USAGE, (done.returncode, done.stderr)
    assert "cap" in done.stderr


def test_deeply_nested_toml_is_a_recipe_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A recipe holding a 5,000-deep TOML array is a recipe error (exit 2), not a RecursionError."""
    recipe = tmp_path / "recipe.toml"
    recipe.write_text("x = " + "[" * 5000 + "]" * 5000 + "\n")
    assert main(["build", str(recipe), "--out", str(tmp_path / "out"), "--quiet"]) == EXIT_USAGE
    assert "nested" in capsys.readouterr().err


def test_verify_against_deeply_nested_json_is_reported(dataset: Path, tmp_path: Path) -> None:
    """`verify --against` a 100,000-deep JSON file reports the committed manifest as unusable (exit 1)."""
    against = tmp_path / "deep.json"
    against.write_text("[" * 100_000 + "]" * 100_000)
    done = run_cli(["verify", str(dataset), "--against", str(against)])
    assert done.returncode == 1, (done.returncode, done.stderr)
    assert "unusable" in done.stdout + done.stderr


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_verify_against_a_fifo_is_refused_without_waiting(dataset: Path, tmp_path: Path) -> None:
    """`verify --against` a FIFO is refused at once (no writer would ever come), not a hang."""
    fifo = tmp_path / "pipe.json"
    os.mkfifo(fifo)
    done = run_cli(["verify", str(dataset), "--against", str(fifo)], timeout=60)
    assert done.returncode == 1, (done.returncode, done.stderr)
    assert "regular file" in done.stdout + done.stderr


# -- verify leaves no gaps ---------------------------------------------------------------------------
def _reseal(d: Path, edit: Callable[[dict[str, Any]], None]) -> None:
    m: dict[str, Any] = json.loads((d / MANIFEST_NAME).read_text())
    edit(m)
    (d / MANIFEST_NAME).write_text(dumps(seal(m)))


@pytest.mark.parametrize("folder", ["shards/train", "documents"])
def test_verify_reports_an_empty_folder_in_a_data_folder(dataset: Path, folder: str) -> None:
    """An empty folder below shards/ or documents/ is reported as unlisted."""
    (dataset / folder / "spare").mkdir()
    report = verify(dataset)
    assert [(p.path, p.kind) for p in report.problems] == [(f"{folder}/spare", "unlisted")], report.problems


@pytest.mark.parametrize("location", ["local", "file-uri"])
@pytest.mark.parametrize("folder", ["shards/train", "documents"])
def test_verify_reports_a_symlinked_folder_in_a_data_folder(
    dataset: Path, tmp_path: Path, folder: str, location: str
) -> None:
    """A symlink to a folder outside (``shards/train/etc -> elsewhere``) inside a data folder is
    reported as unsafe, for a local directory and for the same dataset named by a file:// URI."""
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "passwd").write_text("not the dataset's\n")
    os.symlink(elsewhere, dataset / folder / "etc", target_is_directory=True)
    report = verify(dataset if location == "local" else dataset.as_uri())
    assert [(p.path, p.kind) for p in report.problems] == [(f"{folder}/etc", "unsafe")], report.problems


def test_manifest_symlink_leading_outside_is_refused(dataset: Path, tmp_path: Path) -> None:
    """A manifest.json that is a symlink to a file outside the dataset is reported unsafe by verify
    and refused by open_dataset, even when the file it points at is a valid manifest."""
    outside = tmp_path / "elsewhere.json"
    shutil.move(dataset / MANIFEST_NAME, outside)
    os.symlink(outside, dataset / MANIFEST_NAME)
    assert [(p.path, p.kind) for p in verify(dataset).problems] == [(MANIFEST_NAME, "unsafe")]
    with pytest.raises(UnsafePathError):
        open_dataset(dataset)


def test_file_uri_dataset_with_a_shard_symlinked_outside_is_unsafe(dataset: Path, tmp_path: Path) -> None:
    """A dataset named by a file:// URI whose shard is a symlink to a file outside is reported unsafe."""
    path, _ = _first_shard(dataset)
    outside = tmp_path / "moved.arrow"
    shutil.move(path, outside)
    os.symlink(outside, path)
    rel = path.relative_to(dataset).as_posix()
    assert [(p.path, p.kind) for p in verify(dataset.as_uri()).problems] == [(rel, "unsafe")]


def test_shard_listed_twice_is_a_manifest_problem(dataset: Path) -> None:
    """A re-sealed manifest listing one shard file in two entries is a manifest problem (and the
    file is not hashed once per entry)."""
    _first_shard(dataset, 1)[0].unlink()

    def twice(m: dict[str, Any]) -> None:
        shards = m["splits"]["train"]["shards"]
        for key in ("path", "bytes", "hash", "token_hash"):
            shards[1][key] = shards[0][key]

    _reseal(dataset, twice)
    report = verify(dataset)
    assert [p.kind for p in report.problems] == ["manifest"] and "more than once" in report.problems[0].detail
    assert report.files_checked == 0
    with pytest.raises(ManifestError, match="more than once"):
        open_dataset(dataset)


@pytest.mark.parametrize("where", ["shard", "summary"])
def test_document_counts_that_disagree_are_a_manifest_problem(dataset: Path, where: str) -> None:
    """A re-sealed manifest whose shards begin more documents than the split holds, or whose
    summary gives the split another document count, is a manifest problem."""

    def edit(m: dict[str, Any]) -> None:
        if where == "shard":
            m["splits"]["train"]["shards"][0]["documents"] += 1
        else:
            m["summary"]["splits"]["train"]["documents"] += 1

    _reseal(dataset, edit)
    report = verify(dataset)
    assert [p.kind for p in report.problems] == ["manifest"] and "documents" in report.problems[0].detail
