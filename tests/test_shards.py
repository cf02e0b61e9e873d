"""Shards are Arrow IPC files per the Arrow columnar format, read back zero-copy."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from seqpipe.errors import ShardCorruptError, ShardMissingError
from seqpipe.shards import id_dtype, read_shard, write_shard


def test_ipc_file_magic(tmp_path: Path) -> None:
    """A shard starts with ARROW1 + padding to 8 bytes and ends with ARROW1."""
    # Source: Arrow columnar format specification (docs/source/format/Columnar.rst, "IPC File Format"):
    # <magic number "ARROW1"> <empty padding bytes [to 8 byte boundary]> ... <magic number "ARROW1">
    p = tmp_path / "s.arrow"
    write_shard(p, np.arange(100, dtype=np.uint16))
    raw = p.read_bytes()
    assert raw[:8] == b"ARROW1\x00\x00"
    assert raw[-6:] == b"ARROW1"


def test_read_is_zero_copy_memory_map(tmp_path: Path) -> None:
    """Reading an uncompressed shard allocates nothing in Arrow's pool: the ids are the mapped file."""
    p = tmp_path / "s.arrow"
    ids = np.arange(1 << 20, dtype=np.uint32)
    write_shard(p, ids)
    before = pa.total_allocated_bytes()
    got = read_shard(p, dtype=np.dtype(np.uint32), expected_tokens=len(ids))
    assert pa.total_allocated_bytes() - before < 1 << 16
    assert not got.flags.writeable
    np.testing.assert_array_equal(got, ids)


def test_zstd_shard_reads_back(tmp_path: Path) -> None:
    """A zstd-compressed shard decompresses to the same ids."""
    p = tmp_path / "z.arrow"
    ids = np.random.default_rng(1).integers(0, 500, 10_000).astype(np.uint16)
    write_shard(p, ids, compression="zstd")
    np.testing.assert_array_equal(read_shard(p), ids)


def test_token_hash_independent_of_compression(tmp_path: Path) -> None:
    """The token hash covers the ids, not the file layout."""
    ids = np.arange(5000, dtype=np.uint16)
    _, h1 = write_shard(tmp_path / "a.arrow", ids)
    _, h2 = write_shard(tmp_path / "b.arrow", ids, compression="zstd")
    assert h1 == h2


@pytest.mark.parametrize(
    ("size", "dtype"), [(2, np.uint8), (256, np.uint8), (257, np.uint16), (65536, np.uint16), (65537, np.uint32)]
)
def test_smallest_id_dtype(size: int, dtype: type) -> None:
    """Ids use the smallest unsigned type that holds vocabulary size - 1."""
    assert id_dtype(size) == np.dtype(dtype)


def test_truncated_and_missing_shards_raise_our_errors(tmp_path: Path) -> None:
    """A truncated file or a missing one raises a seqpipe error, never an Arrow one."""
    p = tmp_path / "s.arrow"
    write_shard(p, np.arange(1000, dtype=np.uint16))
    raw = p.read_bytes()
    for cut in (0, 7, len(raw) // 2, len(raw) - 1):
        p.write_bytes(raw[:cut])
        with pytest.raises(ShardCorruptError):
            read_shard(p)
    with pytest.raises(ShardMissingError):
        read_shard(tmp_path / "nope.arrow")
    p.write_bytes(raw)
    with pytest.raises(ShardCorruptError, match="manifest says"):
        read_shard(p, expected_tokens=999)


def _stage_tree(root: Path) -> list[Path]:
    """A stage with a file and nested shard directories listed, and one file not listed."""
    for rel in ("vocab.arrow", "shards/train/000000.arrow", "shards/test/000000.arrow", "stray.txt"):
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(rel.encode())
    return [root / "vocab.arrow", root / "shards/train/000000.arrow", root / "shards/test/000000.arrow"]


def _record_fsyncs(monkeypatch: pytest.MonkeyPatch) -> set[int]:
    """Make seqpipe.shards' fsync record the inode of each file or directory it syncs; return the set."""
    import os

    from seqpipe import shards

    synced: set[int] = set()

    class Recording:
        def __getattr__(self, name: str) -> object:
            return getattr(os, name)

        def fsync(self, fd: int) -> None:
            synced.add(os.fstat(fd).st_ino)

    monkeypatch.setattr(shards, "os", Recording())
    return synced


def test_sync_tree_fsyncs_every_listed_file_and_the_directories_holding_them(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Every file under the listed entries and every directory on their way is fsynced; a file
    outside them is not."""

    from seqpipe import shards

    listed = _stage_tree(tmp_path)
    synced = _record_fsyncs(monkeypatch)
    shards.sync_tree(tmp_path, ["vocab.arrow", "shards", "missing.arrow"])
    dirs = [tmp_path, tmp_path / "shards", tmp_path / "shards/train", tmp_path / "shards/test"]
    assert {p.stat().st_ino for p in listed + dirs} <= synced
    assert (tmp_path / "stray.txt").stat().st_ino not in synced


def test_sync_tree_names_the_file_it_could_not_make_durable(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """An fsync failing with ENOSPC raises OutputWriteError naming the file."""
    import errno
    import os

    from seqpipe import shards
    from seqpipe.errors import OutputWriteError

    _stage_tree(tmp_path)

    class FullDisk:
        def __getattr__(self, name: str) -> object:
            return getattr(os, name)

        def fsync(self, fd: int) -> None:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(shards, "os", FullDisk())
    with pytest.raises(OutputWriteError) as caught:
        shards.sync_tree(tmp_path, ["shards"])
    assert "000000.arrow" in str(caught.value) and "No space left" in str(caught.value)


def test_sync_tree_without_root_dir_syncs_the_entries_but_not_the_root(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With root_dir=False every listed file and the directories inside the entries are fsynced,
    the root directory is not (its caller renames the entries out and syncs their new home)."""

    from seqpipe import shards

    listed = _stage_tree(tmp_path)
    synced = _record_fsyncs(monkeypatch)
    shards.sync_tree(tmp_path, ["vocab.arrow", "shards"], root_dir=False)
    dirs = [tmp_path / "shards", tmp_path / "shards/train", tmp_path / "shards/test"]
    assert {p.stat().st_ino for p in listed + dirs} <= synced
    assert tmp_path.stat().st_ino not in synced
