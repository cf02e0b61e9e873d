"""Content hashes and canonical JSON: the only way seqpipe fingerprints anything.

XXH3-128 (xxhash) over bytes; canonical JSON is sorted keys, no spaces, ASCII
escapes, integers and strings only where fingerprints are concerned. Python's
``hash()`` and dict order never reach a fingerprint.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable
from pathlib import Path
from typing import Any, Final

import numpy as np
import pyarrow as pa
import xxhash

BLOCK: Final = 8 << 20  # 8 MiB reads: large enough to run at disk/page-cache speed


def canonical_json(obj: Any) -> str:
    """Serialize ``obj`` as canonical JSON (sorted keys, compact, ASCII)."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)


def hash_bytes(data: bytes | bytearray | memoryview) -> str:
    """XXH3-128 of ``data`` as 32 lowercase hex digits."""
    return xxhash.xxh3_128_hexdigest(data)


def hash_chunks(chunks: Iterable[bytes]) -> str:
    """``hash_bytes`` of the chunks joined, hashed one after another (never joined in memory)."""
    digest = xxhash.xxh3_128()
    for chunk in chunks:
        digest.update(chunk)
    return digest.hexdigest()


def hash_json(obj: Any) -> str:
    """XXH3-128 of the canonical JSON of ``obj``."""
    return hash_bytes(canonical_json(obj).encode("ascii"))


def hash_array(values: np.ndarray) -> str:
    """XXH3-128 of an integer array's little-endian bytes (independent of file layout)."""
    arr = np.ascontiguousarray(values)
    if arr.dtype.byteorder == ">" or (arr.dtype.byteorder == "=" and np.little_endian is False):
        arr = arr.astype(arr.dtype.newbyteorder("<"))
    return xxhash.xxh3_128_hexdigest(arr.tobytes() if arr.ndim != 1 else arr.data.cast("B"))


def hash_stream(stream: pa.NativeFile, block: int = BLOCK) -> str:
    """XXH3-128 of the bytes left in a pyarrow input stream, read ``block`` bytes at a time
    into pyarrow buffers (hashed where they lie, no copy into Python bytes)."""
    h = xxhash.xxh3_128()
    while True:
        chunk = stream.read_buffer(block)
        if not chunk.size:
            break
        h.update(chunk)
    return h.hexdigest()


def hash_file(path: str | Path, block: int = BLOCK) -> str:
    """XXH3-128 of a file's bytes.

    A local file is hashed straight from memory maps of ``block`` bytes at a time (no copy into
    a buffer; each window unmapped before the next, so the pages of a large file do not all count
    in this process's resident memory at once), or read in blocks of ``block`` bytes where it
    cannot be mapped. A filesystem URI (see
    :mod:`seqpipe.filesystem`) is streamed through pyarrow in blocks of ``block`` bytes;
    a file that is gone is a SourceMissingError, one that cannot be read a SourceError.
    """
    from seqpipe import filesystem

    if filesystem.is_uri(path):
        return _hash_uri(str(path), block)
    try:
        return _hash_mapped(path, block)
    except (ValueError, OSError):  # an empty file cannot be mapped; some filesystems refuse
        pass
    h = xxhash.xxh3_128()
    with open(path, "rb", buffering=0) as fh:
        buf = bytearray(block)
        view = memoryview(buf)
        while True:
            n = fh.readinto(buf)
            if not n:
                break
            h.update(view[:n])
    return h.hexdigest()


def _hash_mapped(path: str | Path, block: int) -> str:
    """XXH3-128 of a local file hashed through read-only memory maps of ``block`` bytes (rounded
    up to the mapping granularity), one after another; the same digest as one map of the whole
    file."""
    import mmap

    window = -(-max(block, 1) // mmap.ALLOCATIONGRANULARITY) * mmap.ALLOCATIONGRANULARITY
    h = xxhash.xxh3_128()
    with open(path, "rb") as src:
        size = os.fstat(src.fileno()).st_size
        if size == 0:
            raise ValueError("an empty file cannot be mapped")
        for offset in range(0, size, window):
            length = min(window, size - offset)
            with mmap.mmap(src.fileno(), length, access=mmap.ACCESS_READ, offset=offset) as mapped:
                h.update(mapped)
    return h.hexdigest()


def _hash_uri(uri: str, block: int) -> str:
    from seqpipe import filesystem
    from seqpipe.errors import SourceError, SourceMissingError

    try:
        with filesystem.open_raw_stream(uri) as stream:
            return hash_stream(stream, block)
    except FileNotFoundError as exc:
        raise SourceMissingError(uri, filesystem.FILE_GONE) from exc
    except (OSError, pa.ArrowException) as exc:
        raise SourceError(uri, f"cannot read the file to hash it: {exc}") from exc
