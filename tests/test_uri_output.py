"""A dataset's output may be a filesystem URI: built locally, uploaded, verified where it lies.

The filesystems are pyarrow's local one (``file://``) and its in-memory mock behind a made-up
scheme (no network here): S3, GCS and HDFS themselves are not exercised.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.fs as pafs
import pytest
from conftest import recipe_text, write_project

from seqpipe import BuildResult, build, filesystem
from seqpipe import transfer as remote
from seqpipe._verify import listed_files, verify
from seqpipe.cli import main
from seqpipe.dataset import open_dataset
from seqpipe.errors import DatasetError, RecipeError, SeqpipeError, UnsafePathError
from seqpipe.manifest import MANIFEST_NAME, check_relative, dumps, parse_manifest, seal
from seqpipe.recipe import parse_recipe

# pyarrow's in-memory filesystem for its own tests (pyarrow._fs._MockFileSystem in the installed pyarrow)
MockFileSystem = getattr(pytest.importorskip("pyarrow._fs"), "_MockFileSystem", None)
pytestmark = pytest.mark.skipif(MockFileSystem is None, reason="this pyarrow has no _MockFileSystem")

MEM = "memout://bucket"  # a scheme pyarrow does not know: only the registration below serves it
DEST = MEM + "/sets/ferry"


@pytest.fixture
def root(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The shared demo corpus and its recipe under ``tmp_path/src`` (see conftest); the user
    cache directory moved under ``tmp_path``."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    src = tmp_path / "src"
    write_project(src, shard_tokens=250)
    return src


@pytest.fixture
def mem() -> Iterator[pafs.FileSystem]:
    """A fresh in-memory filesystem behind ``MEM`` for one test."""
    fs = MockFileSystem()
    filesystem.register_filesystem(MEM, fs)
    yield fs
    filesystem.clear_filesystems()


def run(root: Path, out: str | Path, tokens: int = 250, **kwargs: Any) -> BuildResult:
    return build(parse_recipe(recipe_text(shard_tokens=tokens), root), out, progress=False, **kwargs)


def local_files(directory: Path) -> dict[str, bytes]:
    """Every file of a local dataset, the private area left out."""
    return {
        p.relative_to(directory).as_posix(): p.read_bytes()
        for p in sorted(directory.rglob("*"))
        if p.is_file() and p.relative_to(directory).parts[0] != ".seqpipe"
    }


def mem_files(fs: pafs.FileSystem, prefix: str = "sets/ferry") -> dict[str, bytes]:
    infos = fs.get_file_info(pafs.FileSelector(prefix, recursive=True, allow_not_found=True))
    out = {}
    for info in infos:
        if info.type == pafs.FileType.File:
            with fs.open_input_stream(info.path) as stream:
                out[info.path[len(prefix) + 1 :]] = stream.read()
    return out


def mem_write(fs: pafs.FileSystem, rel: str, data: bytes) -> None:
    with fs.open_output_stream("sets/ferry/" + rel) as sink:
        sink.write(data)


def test_file_uri_output_is_byte_identical_to_a_local_build(root: Path, tmp_path: Path) -> None:
    """Every file (manifest included) of a build to ``file://`` equals the local build's."""
    ref = run(root, tmp_path / "local")
    uri = "file://" + (tmp_path / "published").resolve().as_posix()
    got = run(root, uri)
    assert got.directory == uri and isinstance(got.directory, str)
    assert got.manifest == ref.manifest
    published = local_files(tmp_path / "published")
    assert published == local_files(tmp_path / "local")
    assert not (tmp_path / "published" / ".seqpipe").exists()  # the private area stays local
    work = Path(got.extra["work_dir"])
    assert work.parent == tmp_path / "xdg" / "seqpipe" / "remote" and len(work.name) == 16
    assert got.extra["uploaded"] == len(listed_files(got.manifest)) + 1
    assert any(line.startswith("published") for line in got.summary_lines())
    assert verify(uri).ok


def test_build_to_mock_filesystem_then_verify(root: Path, tmp_path: Path, mem: pafs.FileSystem) -> None:
    result = run(root, DEST, work_dir=tmp_path / "work")
    assert result.directory == DEST
    files = mem_files(mem)
    listed = {e["path"] for e in listed_files(result.manifest)}
    assert set(files) == listed | {MANIFEST_NAME}
    assert files[MANIFEST_NAME] == dumps(result.manifest).encode("ascii")
    report = verify(DEST)
    assert report.ok, report.problems
    assert report.directory == DEST and report.fingerprint == result.fingerprint
    assert report.files_checked == len(listed)
    assert report.bytes_checked == sum(len(files[p]) for p in listed)
    assert main(["verify", DEST]) == 0


def test_changed_byte_in_a_shard_is_corrupt(root: Path, tmp_path: Path, mem: pafs.FileSystem) -> None:
    result = run(root, DEST, work_dir=tmp_path / "work")
    rel = result.manifest["splits"]["train"]["shards"][1]["path"]
    data = bytearray(mem_files(mem)[rel])
    data[len(data) // 2] ^= 0x01
    mem_write(mem, rel, bytes(data))
    report = verify(DEST)
    assert [(p.path, p.kind) for p in report.problems] == [(rel, "corrupt")]
    assert main(["verify", DEST]) == 1


def test_truncated_and_missing_files_are_reported(root: Path, tmp_path: Path, mem: pafs.FileSystem) -> None:
    result = run(root, DEST, work_dir=tmp_path / "work")
    shards = result.manifest["splits"]["train"]["shards"]
    mem_write(mem, shards[0]["path"], mem_files(mem)[shards[0]["path"]][:-3])
    mem.delete_file("sets/ferry/" + shards[1]["path"])
    kinds = {p.path: p.kind for p in verify(DEST).problems}
    assert kinds == {shards[0]["path"]: "truncated", shards[1]["path"]: "missing"}


def test_unlisted_files_are_reported(root: Path, tmp_path: Path, mem: pafs.FileSystem) -> None:
    run(root, DEST, work_dir=tmp_path / "work")
    mem_write(mem, "shards/train/999999.arrow", b"stray")
    mem.create_dir("sets/ferry/notes")
    mem_write(mem, "notes/todo.txt", b"stray")
    problems = verify(DEST).problems
    assert [(p.path, p.kind) for p in problems] == [("notes", "unlisted"), ("shards/train/999999.arrow", "unlisted")]


@pytest.mark.parametrize("hostile", ["../x", "shards/../../x", "/etc/passwd", "shards\\x", "a\x00b"])
def test_hostile_manifest_path_is_refused(root: Path, tmp_path: Path, mem: pafs.FileSystem, hostile: str) -> None:
    """A sealed manifest naming a path outside the dataset: verify reports it unsafe, reads nothing there."""
    result = run(root, DEST, work_dir=tmp_path / "work")
    body = {k: v for k, v in result.manifest.items() if k not in ("fingerprint", "manifest_hash")}
    body["splits"]["train"]["shards"][0]["path"] = hostile
    hacked = seal(body)
    mem_write(mem, MANIFEST_NAME, dumps(hacked).encode("ascii"))
    parse_manifest(dumps(hacked).encode("ascii"), "test")  # the schema itself accepts it
    problems = verify(DEST).problems
    assert (hostile, "unsafe") in [(p.path, p.kind) for p in problems]
    with pytest.raises(UnsafePathError):
        check_relative(hostile)


def test_republish_after_recipe_change_removes_old_shards(root: Path, tmp_path: Path, mem: pafs.FileSystem) -> None:
    first = run(root, DEST, work_dir=tmp_path / "work")
    old = {s["path"] for sp in first.manifest["splits"].values() for s in sp["shards"]}
    assert len(old) > 3
    second = run(root, DEST, tokens=100_000, work_dir=tmp_path / "work")
    new = {s["path"] for sp in second.manifest["splits"].values() for s in sp["shards"]}
    assert new < old and second.extra["deleted"] == len(old - new)
    shards = {p for p in mem_files(mem) if p.startswith("shards/")}
    assert shards == new
    assert mem_files(mem)[MANIFEST_NAME] == dumps(second.manifest).encode("ascii")
    assert verify(DEST).ok


def test_second_publish_uploads_nothing_and_an_interrupted_one_resumes(
    root: Path, tmp_path: Path, mem: pafs.FileSystem, monkeypatch: pytest.MonkeyPatch
) -> None:
    sent: list[str] = []
    real = remote._upload

    def counting(where: remote.RemoteDir, local: Path, rel: str) -> None:
        sent.append(rel)
        real(where, local, rel)

    monkeypatch.setattr(remote, "_upload", counting)
    first = run(root, DEST, work_dir=tmp_path / "work")
    listed = [e["path"] for e in listed_files(first.manifest)]
    assert sorted(sent) == sorted([*listed, MANIFEST_NAME]) and sent[-1] == MANIFEST_NAME
    sent.clear()
    again = run(root, DEST, work_dir=tmp_path / "work")
    assert sent == [] and again.extra["uploaded"] == 0 and again.extra["already_there"] == len(listed)
    # as after a publish cut short: the manifest gone (deleted first), one shard not yet uploaded
    shard = first.manifest["splits"]["train"]["shards"][0]["path"]
    mem.delete_file("sets/ferry/" + MANIFEST_NAME)
    mem.delete_file("sets/ferry/" + shard)
    assert not verify(DEST).ok
    run(root, DEST, work_dir=tmp_path / "work")
    assert sent == [shard, MANIFEST_NAME]
    assert verify(DEST).ok


def test_a_same_sized_but_different_file_is_uploaded_again_manifest_gone_meanwhile(
    root: Path, tmp_path: Path, mem: pafs.FileSystem, monkeypatch: pytest.MonkeyPatch
) -> None:
    first = run(root, DEST, work_dir=tmp_path / "work")
    rel = first.manifest["vocabulary"]["path"]
    good = mem_files(mem)[rel]
    mem_write(mem, rel, bytes(len(good)))
    seen: list[tuple[str, bool]] = []  # (file uploaded, was a manifest at the destination then)
    real = remote._upload

    def watching(where: remote.RemoteDir, local: Path, name: str) -> None:
        seen.append((name, MANIFEST_NAME in mem_files(mem)))
        real(where, local, name)

    monkeypatch.setattr(remote, "_upload", watching)
    again = run(root, DEST, work_dir=tmp_path / "work")
    assert seen == [(rel, False), (MANIFEST_NAME, False)] and again.extra["uploaded"] == 2
    assert mem_files(mem)[rel] == good and verify(DEST).ok


def test_unknown_scheme_as_output_is_a_clear_error(
    root: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(RecipeError, match="nosuchscheme") as info:
        run(root, "nosuchscheme://bucket/ferry")
    assert isinstance(info.value, SeqpipeError) and info.value.key == "out"
    assert not (tmp_path / "xdg").exists()  # refused before any work
    assert main(["build", str(root / "recipe.toml"), "-o", "nosuchscheme://bucket/ferry", "--quiet"]) == 2
    assert "nosuchscheme" in capsys.readouterr().err
    with pytest.raises(RecipeError):
        verify("nosuchscheme://bucket/ferry")


def test_cli_builds_to_a_uri_with_a_work_dir(
    root: Path, tmp_path: Path, mem: pafs.FileSystem, capsys: pytest.CaptureFixture[str]
) -> None:
    work = tmp_path / "cli-work"
    assert main(["build", str(root / "recipe.toml"), "-o", DEST, "--work-dir", str(work), "--quiet"]) == 0
    assert (work / MANIFEST_NAME).is_file()
    assert mem_files(mem)[MANIFEST_NAME] == (work / MANIFEST_NAME).read_bytes()
    assert main(["build", str(root / "recipe.toml"), "-o", DEST, "--work-dir", str(work)]) == 0
    out = capsys.readouterr().out
    assert f"dataset      {DEST}" in out and "0 file(s) uploaded" in out


def test_no_manifest_at_the_uri(mem: pafs.FileSystem) -> None:
    report = verify(MEM + "/nothing/here")
    assert [p.kind for p in report.problems] == ["manifest"] and "no manifest" in report.problems[0].detail


def test_work_dir_needs_a_uri_output(root: Path, tmp_path: Path) -> None:
    with pytest.raises(RecipeError, match="work_dir"):
        run(root, tmp_path / "out", work_dir=tmp_path / "work")
    with pytest.raises(DatasetError, match="copy_dir"):
        open_dataset(tmp_path / "out", copy_dir=tmp_path / "copy")


def test_open_dataset_at_a_uri_reads_a_checked_local_copy(
    root: Path, tmp_path: Path, mem: pafs.FileSystem, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The copy holds the same bytes as the local build, streams the same tokens, and a second
    open downloads nothing (downloads counted by wrapping remote._download)."""
    local = run(root, tmp_path / "local")
    run(root, DEST)
    calls: list[str] = []
    real = remote._download
    monkeypatch.setattr(remote, "_download", lambda r, rel, dest: (calls.append(rel), real(r, rel, dest))[1])
    ds = open_dataset(DEST)
    copy = remote.default_copy_dir(remote.open_remote(DEST))
    assert ds.directory == copy and copy.is_relative_to(tmp_path / "xdg")
    assert local_files(copy) == local_files(Path(local.directory))
    want = open_dataset(local.directory).split("train").stream
    got = ds.split("train").stream
    assert len(got) == len(want) and np.array_equal(np.concatenate(got.chunks), np.concatenate(want.chunks))
    assert sorted(calls) == sorted(e["path"] for e in listed_files(local.manifest))
    calls.clear()
    open_dataset(DEST)
    assert calls == []
    assert verify(copy).ok


def test_fetch_repairs_a_damaged_copy_and_refuses_damaged_remote_bytes(
    root: Path, tmp_path: Path, mem: pafs.FileSystem
) -> None:
    run(root, DEST)
    copy = tmp_path / "copy"
    open_dataset(DEST, copy_dir=copy)
    shard = sorted((copy / "shards").rglob("*.arrow"))[0]
    shard.write_bytes(shard.read_bytes()[:-3] + b"zzz")  # a local change: fetched again
    (copy / "shards" / "train" / "999999.arrow").write_bytes(b"stray")  # unlisted: removed
    stats = remote.fetch_remote(remote.open_remote(DEST), copy)
    assert (stats.uploaded, stats.deleted) == (1, 1) and verify(copy).ok
    rel = shard.relative_to(copy).as_posix()
    where = remote.open_remote(DEST)
    with mem.open_input_stream(where.inner(rel)) as f:
        data = bytearray(f.read())
    data[-1] ^= 0xFF  # the published file is damaged: the copy must not take it
    with mem.open_output_stream(where.inner(rel)) as f:
        f.write(bytes(data))
    shard.unlink()
    with pytest.raises(DatasetError, match="differ from the manifest"):
        open_dataset(DEST, copy_dir=copy)
    assert not (copy / MANIFEST_NAME).exists() and not shard.exists()


def test_cli_batches_at_a_uri_match_the_local_dataset(
    root: Path, tmp_path: Path, mem: pafs.FileSystem, capsys: pytest.CaptureFixture[str]
) -> None:
    local = run(root, tmp_path / "local")
    run(root, DEST)
    args = ["--split", "train", "--batch-size", "2", "--window", "8", "--format", "hash"]
    assert main(["batches", str(local.directory), *args]) == 0
    want = capsys.readouterr().out
    assert main(["batches", DEST, *args]) == 0
    assert capsys.readouterr().out == want and want.strip()
