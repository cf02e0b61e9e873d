"""Arrow IPC files on disk: token shards and small tables (vocabulary, documents).

A shard is an Arrow IPC *file* (Columnar format spec, "IPC File Format") with
one record batch and one column ``ids`` of an unsigned integer type. Written
uncompressed by default so readers can memory-map it without a copy; zstd is
optional. Every write goes to a temporary name in the same directory, is
fsynced, then renamed into place, so a reader never sees half a file; the
files a build stages are fsynced together before it publishes them
(``sync_tree``) instead of one by one.
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path
from typing import Final

import numpy as np
import pyarrow as pa

from seqpipe._hashing import hash_array
from seqpipe.errors import OutputWriteError, SeqpipeError, ShardCorruptError, ShardMissingError

SHARD_FORMAT: Final = "seqpipe.shard/2"
ARROW_MAGIC: Final = b"ARROW1"


def id_dtype(vocab_size: int) -> np.dtype:
    """Smallest unsigned integer type that holds every id of the vocabulary."""
    for dt in (np.uint8, np.uint16, np.uint32):
        if vocab_size - 1 <= np.iinfo(dt).max:
            return np.dtype(dt)
    return np.dtype(np.uint64)


def fsync_dir(path: Path) -> None:
    """fsync a directory so a rename inside it is durable (no-op where unsupported)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.{os.getpid()}.tmp")


@contextmanager
def _atomic(path: Path, durable: bool = True) -> Iterator[Path]:
    """A temporary name beside ``path`` to write to; on success it is renamed onto ``path``
    (fsynced first, and the directory after, when ``durable``), on failure removed.

    Intermediate files that a re-run recomputes anyway (cached parts, encoded parts) skip the
    fsyncs: a killed process leaves them whole in the page cache, and nothing is promised
    for them across a power loss."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _tmp_name(path)
    try:
        yield tmp
        if durable:
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        if isinstance(exc, SeqpipeError):  # a reader's error (a missing input), not this write's
            raise
        raise OutputWriteError(
            f"{path}: cannot write it ({exc}); free space (or fix permissions) there and run the build "
            "again: it resumes",
            path=str(path),
        ) from exc
    finally:
        if tmp.exists():
            tmp.unlink()
    if durable:
        fsync_dir(path.parent)


SYNC_THREADS: Final = 16


def sync_tree(root: Path, entries: Sequence[str], *, root_dir: bool = True) -> None:
    """fsync every file under ``root``'s ``entries`` (files or directories), then the directories
    holding them. A build writes its staged files without fsync and makes them durable here, all
    at once before they are published: fsyncs issued together share the filesystem's journal
    commits, where one fsync per file as it is written waits for a commit each. ``root_dir``
    False: ``root`` itself is not synced, for a caller that renames every entry out of it and
    syncs the directory they land in (a name in ``root`` outlives no crash that matters)."""
    files: list[Path] = []
    dirs = {root} if root_dir else set()
    for name in entries:
        top = root / name
        if top.is_dir():
            for where, _, names in os.walk(top):
                dirs.add(Path(where))
                files.extend(Path(where) / n for n in names)
        elif top.exists():
            files.append(top)
            if root_dir or top.parent != root:
                dirs.add(top.parent)
    with ThreadPoolExecutor(max_workers=max(1, min(SYNC_THREADS, len(files)))) as pool:
        list(pool.map(fsync_file, files))
    for d in sorted(dirs, key=lambda p: len(p.parts), reverse=True):
        fsync_dir(d)


def fsync_file(path: Path) -> None:
    """fsync one file; OutputWriteError naming it when that fails."""
    try:
        with open(path, "rb") as fh:
            os.fsync(fh.fileno())
    except OSError as exc:
        raise OutputWriteError(
            f"{path}: cannot write it ({exc}); free space (or fix permissions) there and run the build again: "
            "it resumes",
            path=str(path),
        ) from exc


def write_table(path: Path, table: pa.Table, *, compression: str | None = None, durable: bool = True) -> int:
    """Write ``table`` as an Arrow IPC file atomically; return its size in bytes."""
    options = pa.ipc.IpcWriteOptions(compression=compression)
    with (
        _atomic(path, durable) as tmp,
        pa.OSFile(str(tmp), "wb") as sink,
        pa.ipc.new_file(sink, table.schema, options=options) as writer,
    ):
        writer.write_table(table, max_chunksize=max(table.num_rows, 1))
    return path.stat().st_size


def write_batches(path: Path, schema: pa.Schema, batches: Iterator[pa.RecordBatch], *, durable: bool = True) -> int:
    """Write record batches as one Arrow IPC file atomically, never holding more than one batch;
    return the file size."""
    with _atomic(path, durable) as tmp, pa.OSFile(str(tmp), "wb") as sink, pa.ipc.new_file(sink, schema) as writer:
        wrote = False
        for batch in batches:
            writer.write_batch(batch)
            wrote = True
        if not wrote:
            writer.write_table(schema.empty_table())
    return path.stat().st_size


def read_table(path: Path, *, memory_map: bool = True, full: bool = False) -> pa.Table:
    """Read an Arrow IPC file, turning any Arrow/OS failure into our error.

    Every array is validated before a value is used: the IPC reader trusts the lengths in the
    file's metadata, so a file declaring more rows than its buffers hold would otherwise be read
    past the end of the mapping (a crash, or bytes of other memory taken for ids). The structural
    check (buffer sizes against length and type) costs nothing per value; ``full`` adds the checks
    that read values (offsets of binary/string columns, dictionary indices), for the small tables
    whose offsets are followed."""
    if not path.is_file():
        raise ShardMissingError(f"{path}: file is missing", path=str(path))
    try:
        source = pa.memory_map(str(path), "r") if memory_map else pa.OSFile(str(path), "rb")
        reader = pa.ipc.open_file(source)
        table = reader.read_all()
        table.validate(full=full)
        return table
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise ShardCorruptError(
            f"{path}: not a readable Arrow IPC file ({exc}); run 'seqpipe verify' on the dataset, then rebuild it",
            path=str(path),
        ) from exc


def write_shard(
    path: Path, ids: np.ndarray, *, compression: str | None = None, durable: bool = True
) -> tuple[int, str]:
    """Write a token shard; return (file size, XXH3-128 of the ids' little-endian bytes)."""
    arr = pa.array(np.ascontiguousarray(ids))
    table = pa.table({"ids": arr}).replace_schema_metadata(
        {
            b"seqpipe.table": b"shard",
            b"seqpipe.format": SHARD_FORMAT.encode(),
            b"seqpipe.compression": (compression or "none").encode(),
        }
    )
    size = write_table(path, table, compression=compression, durable=durable)
    return size, hash_array(ids)


def read_shard(path: Path, *, dtype: np.dtype | None = None, expected_tokens: int | None = None) -> np.ndarray:
    """The ids of a shard: a zero-copy view of the memory-mapped file when uncompressed,
    decompressed into memory otherwise."""
    table = read_table(path)
    try:
        meta = table.schema.metadata or {}
        names = table.schema.names
        col = table.column("ids") if names == ["ids"] else None
    except (UnicodeDecodeError, KeyError, pa.ArrowException) as exc:
        raise ShardCorruptError(f"{path}: malformed shard schema ({exc})", path=str(path)) from exc
    if meta.get(b"seqpipe.table") != b"shard" or col is None:
        raise ShardCorruptError(f"{path}: not a seqpipe shard (expected one column 'ids')", path=str(path))
    if meta.get(b"seqpipe.format") != SHARD_FORMAT.encode():
        raise ShardCorruptError(
            f"{path}: shard format {meta.get(b'seqpipe.format', b'?').decode('utf-8', 'replace')!r}, this seqpipe "
            f"reads {SHARD_FORMAT}: rebuild the dataset with `seqpipe build RECIPE`",
            path=str(path),
        )
    if not pa.types.is_unsigned_integer(col.type):
        raise ShardCorruptError(f"{path}: ids have type {col.type}, expected an unsigned integer", path=str(path))
    if dtype is not None and col.type != pa.from_numpy_dtype(dtype):
        raise ShardCorruptError(f"{path}: ids have type {col.type}, manifest says {dtype}", path=str(path))
    if expected_tokens is not None and len(col) != expected_tokens:
        raise ShardCorruptError(f"{path}: holds {len(col)} tokens, manifest says {expected_tokens}", path=str(path))
    if col.num_chunks == 1:
        chunk = col.chunk(0)
        if chunk.null_count:
            raise ShardCorruptError(f"{path}: ids contain nulls", path=str(path))
        try:
            view: np.ndarray = chunk.to_numpy(zero_copy_only=True)
        except pa.ArrowInvalid:
            view = chunk.to_numpy(zero_copy_only=False)
        return view
    joined: np.ndarray = col.to_numpy()
    return joined
