"""Byte streams for the line-oriented kinds (text, JSON Lines): opening, decompression, blocks.

Files are opened through :mod:`seqpipe.filesystem` (a local path or a filesystem URI).
Decompression is pyarrow's (``compression=...`` on the input stream); a truncated
or corrupt compressed file surfaces as an ``OSError`` from pyarrow, which we turn
into a :class:`SourceError` naming the file.
"""

from __future__ import annotations

import os
import re
import threading
from collections.abc import Iterator
from typing import Final

import pyarrow as pa

from seqpipe.errors import SourceError, SourceMissingError
from seqpipe.filesystem import FILE_GONE, SourcePath, is_uri, open_input_stream, suffix

COMPRESSIONS: Final = ("auto", "none", "gzip", "bz2", "zstd")
_SUFFIXES: Final = {".gz": "gzip", ".bz2": "bz2", ".zst": "zstd"}
UTF8_BOM: Final = b"\xef\xbb\xbf"
_SCAN_BLOCK: Final = 1 << 16


_COMPRESSED_ENDS: Final = tuple(_SUFFIXES)


def codec_for(path: SourcePath, compression: str) -> str | None:
    """The pyarrow codec name for ``path`` (None: not compressed)."""
    if compression == "auto":
        if (
            isinstance(path, str)
            and not path[-4:].lower().endswith(_COMPRESSED_ENDS)
            and path[-1:] != os.sep
            and "/." not in path
            and "://" not in path
        ):
            return None  # a plain local name not ending in a compression suffix: no Path, no split
        return _SUFFIXES.get(_suffix(path).lower())
    return None if compression == "none" else compression


def _suffix(path: SourcePath) -> str:
    """``filesystem.suffix(path)``; a local ``str`` without making a ``Path`` (a build of many
    small files asks this of each file more than once): the same rule as ``PurePath.suffix``."""
    if not isinstance(path, str) or ("://" in path and is_uri(path)):
        return suffix(path)
    # a name with no "." component or trailing separator is already what ``Path`` would make of it
    name = (
        path.rpartition(os.sep)[2]
        if "/." not in path and path[-1:] != os.sep
        else os.path.basename(os.path.normpath(path))
    )
    dot = name.rfind(".")
    return name[dot:] if 0 < dot < len(name) - 1 else ""


def _open(path: SourcePath, codec: str | None) -> pa.NativeFile:
    try:
        return open_input_stream(path, codec)
    except FileNotFoundError as exc:
        raise SourceMissingError(str(path), FILE_GONE) from exc
    except (OSError, pa.ArrowException) as exc:
        raise SourceError(str(path), f"cannot open the file: {exc}") from exc


def _read(stream: pa.NativeFile, size: int, path: SourcePath, codec: str | None) -> bytes:
    try:
        data: bytes = stream.read(size)
    except (OSError, pa.ArrowException) as exc:
        what = f"{codec} stream is truncated or corrupt" if codec else "read failed"
        raise SourceError(str(path), f"{what}: {exc}") from exc
    return data


def read_blocks(
    path: SourcePath, codec: str | None, start: int, stop: int | None, block_bytes: int
) -> Iterator[tuple[int, bytes]]:
    """``(offset, block)`` pairs covering ``[start, stop)`` of the (decompressed) stream.

    A UTF-8 byte order mark at offset 0 is dropped; offsets stay absolute, so the
    first block of such a file starts at offset 3 (and is empty if nothing follows
    the mark). Never reads at or past ``stop``. A compressed stream cannot seek: a part
    that starts later decompresses the bytes before ``start`` and drops them.
    """
    with _open(path, codec) as stream:
        if start and codec is None:
            stream.seek(start)
        elif start:
            skipped = 0
            while skipped < start and (more := _read(stream, min(_SCAN_BLOCK << 4, start - skipped), path, codec)):
                skipped += len(more)
        pos = start
        pending = b""
        if start == 0:
            # Read the first bytes one short read at a time if need be (decompressing
            # streams may return less than asked), but never past stop.
            head = len(UTF8_BOM) if stop is None else min(len(UTF8_BOM), stop)
            while len(pending) < head and (more := _read(stream, head - len(pending), path, codec)):
                pending += more
            if pending == UTF8_BOM:
                pending = b""
                pos = len(UTF8_BOM)
        yielded = False
        while stop is None or pos < stop:
            want = block_bytes if stop is None else min(block_bytes, stop - pos)
            if want > len(pending):
                pending += _read(stream, want - len(pending), path, codec)
            block, pending = pending, b""
            if not block:
                break
            yield pos, block
            yielded = True
            pos += len(block)
        if not yielded and pos > start:
            yield pos, b""  # only a byte order mark was there: let the caller count its bytes


def scan_cut(path: SourcePath, pos: int, stop: int, pattern: re.Pattern[bytes]) -> int | None:
    """End of the first match of ``pattern`` at or after ``pos``.

    Used by ``plan``. Only the trailing run of ASCII whitespace is carried from one
    scan block to the next, since our separators consist of such bytes only.
    """
    buf = bytearray()
    base = pos
    with _open(path, None) as stream:
        stream.seek(pos)
        while base + len(buf) < stop:
            block = _read(stream, min(_SCAN_BLOCK, stop - base - len(buf)), path, None)
            if not block:
                return None
            buf += block
            match = pattern.search(buf)
            if match is not None:
                return base + match.end()
            keep = len(buf.rstrip())
            buf = drop_front(buf, keep)
            base += keep
    return None


def plan_cuts(path: SourcePath, size: int, target_bytes: int, separator: re.Pattern[bytes]) -> list[tuple[int, int]]:
    """Byte ranges covering ``[0, size)``: ``ceil(size / target_bytes)`` near-equal parts, each
    cut just after a ``separator`` match found at or past its even share (see :func:`scan_cut`).

    Equal shares rather than ``target_bytes`` then a remainder: a 25 MB file and a 16 MB target
    give two parts of 12.5 MB, not 16 + 9, so workers finish a phase together.
    """
    parts = max(1, -(-size // max(1, target_bytes)))
    cuts = [0]
    for k in range(1, parts):
        pos = size * k // parts
        if pos <= cuts[-1]:  # the part before runs past this share (a long document)
            continue
        cut = scan_cut(path, pos, size, separator)
        if cut is None or cut >= size:
            break
        cuts.append(cut)
    return list(zip(cuts, [*cuts[1:], size], strict=True))


def plan_stream_cuts(
    path: SourcePath, codec: str, target_bytes: int, separator: re.Pattern[bytes], max_input_bytes: int
) -> list[tuple[int, int | None]]:
    """Ranges of the decompressed stream of ``path``: parts of about ``target_bytes``, each cut
    just after a ``separator`` match (the last part runs to the end: ``None``).

    Decompresses the stream once, holding one block and the blank run carried between blocks,
    so the memory of the parts (and of planning) does not depend on the compression ratio.
    ``max_input_bytes`` (0: none) refuses a stream that decompresses to more bytes.
    """
    cuts = [0]
    pos = 0  # offset of buf[0] in the decompressed stream
    buf = bytearray()
    with _open(path, codec) as stream:
        while block := _read(stream, _SCAN_BLOCK << 4, path, codec):
            buf += block
            if max_input_bytes and pos + len(buf) > max_input_bytes:
                raise SourceError(
                    str(path),
                    f"decompresses to more than max_input_bytes = {max_input_bytes} bytes; raise the limit "
                    "(0 for none) if this input is expected to be this large",
                )
            frm = max(0, cuts[-1] + target_bytes - pos)
            # a match that reaches the end of the buffer may go on in the next block: wait for it
            while frm < len(buf) and (match := separator.search(buf, frm)) is not None and match.end() < len(buf):
                cuts.append(pos + match.end())
                frm = max(match.end(), cuts[-1] + target_bytes - pos)
            keep = max(len(buf.rstrip()), min(len(buf), max(0, cuts[-1] + target_bytes - pos)))
            buf = drop_front(buf, keep)
            pos += keep
    end = pos + len(buf)
    if len(cuts) > 1 and cuts[-1] >= end:
        cuts.pop()  # a cut at the very end leaves nothing after it
    return list(zip(cuts, [*cuts[1:], None], strict=True))


def drop_front(buf: bytearray, n: int) -> bytearray:
    """``buf`` without its first ``n`` bytes: resized in place, or copied into a fresh buffer
    while some view of it is still alive (a memoryview or numpy array the garbage collector has
    not freed yet makes the resize raise BufferError, depending on timing)."""
    try:
        del buf[:n]
    except BufferError:
        return bytearray(memoryview(buf)[n:])
    return buf


# -- inputs read once ---------------------------------------------------------------------------

HELD_INPUT_BYTES: Final = 32 << 20  # the bound of encode's in-memory handoff, for the same reason
_HELD_INPUTS: dict[str, bytes] = {}
_HELD_LOCK: Final = threading.Lock()
_held_total: list[int] = [0]


def hold_input(path: str, data: bytes) -> None:
    """Keep the bytes of a small local input that planning read to hash, so an ingest task of
    this process reads it from memory instead of opening it again (up to ``HELD_INPUT_BYTES``
    in all; past that the task reads the file). The task still checks the file's change stamp
    after reading, so held bytes of a file changed since are refused as a read would be."""
    with _HELD_LOCK:
        if _held_total[0] + len(data) <= HELD_INPUT_BYTES:
            _HELD_INPUTS[path] = data
            _held_total[0] += len(data)


def take_input(path: SourcePath) -> bytes | None:
    """The held bytes of ``path`` (forgotten once taken), or None: read the file."""
    if not _HELD_INPUTS or not isinstance(path, str):
        return None
    with _HELD_LOCK:
        data = _HELD_INPUTS.pop(path, None)
        if data is not None:
            _held_total[0] -= len(data)
    return data


def release_inputs() -> None:
    """Forget every held input (after the ingest phase, read or not)."""
    with _HELD_LOCK:
        _HELD_INPUTS.clear()
        _held_total[0] = 0
