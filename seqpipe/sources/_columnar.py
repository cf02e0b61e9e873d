"""What the columnar kinds (Parquet, Arrow IPC) share: the text column and its rules.

A batch of values goes through pyarrow compute when it is clean (no nulls, no
value over ``max_document_bytes``, valid UTF-8): line ends are rewritten with
``pc.replace_substring`` and blank values dropped with one RE2 match, all in C.
A batch with anything to report falls back to one Python call per value, the
same rules as the text kinds (:meth:`DocumentFinisher.finish`), so the two paths
give the same documents; the tests check that they agree.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from typing import Final, TypeVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe.errors import RecordError, SourceError, SourceMissingError
from seqpipe.filesystem import FILE_GONE, SourcePath
from seqpipe.sources.base import DocumentFinisher, Part, RecordSource

T = TypeVar("T")

# The blank set of base.is_blank, applied after CR has become LF.
_BLANK_RE2: Final = r"^[ \t\x0b\x0c\r\n]*$"


def group_parts(sizes: list[int], target_bytes: int) -> list[Part]:
    """Consecutive index ranges whose sizes add up to at least ``target_bytes`` (the last may be less)."""
    parts = []
    start = 0
    total = 0
    for i, size in enumerate(sizes):
        total += size
        if total >= target_bytes:
            parts.append(Part(start, i + 1))
            start, total = i + 1, 0
    if start < len(sizes) or not parts:
        parts.append(Part(start, len(sizes)))
    return parts


def text_column(schema: pa.Schema, field: str, path: SourcePath) -> int:
    """Index of the string column ``field`` in ``schema``; RecordError when absent or not text."""
    index: int = schema.get_field_index(field)
    if index < 0:
        names = ", ".join(repr(n) for n in schema.names) or "none"
        raise RecordError(
            str(path),
            f"no column {field!r} (a single top-level column; columns: {names}); "
            "set field to the column holding the text",
        )
    kind = schema.field(index).type
    if pa.types.is_dictionary(kind):
        kind = kind.value_type
    if not (pa.types.is_string(kind) or pa.types.is_large_string(kind) or pa.types.is_string_view(kind)):
        raise RecordError(str(path), f"column {field!r} has type {schema.field(index).type}, expected a string column")
    return index


def guarded(items: Iterable[T], path: SourcePath, what: str) -> Iterator[T]:
    """Iterate ``items``, turning pyarrow's read errors into SourceError naming ``path``."""
    iterator = iter(items)
    while True:
        try:
            item = next(iterator)
        except StopIteration:
            return
        except (OSError, pa.ArrowException) as exc:
            raise SourceError(str(path), f"cannot read the {what}: {exc}") from exc
        yield item


def open_or_fail(opener: Callable[[], T], path: SourcePath, what: str) -> T:
    """``opener()``, with a missing file or a file of another format as SourceError."""
    try:
        return opener()
    except FileNotFoundError as exc:
        raise SourceMissingError(str(path), FILE_GONE) from exc
    except (OSError, pa.ArrowException) as exc:
        raise SourceError(str(path), f"not a readable {what}: {exc}") from exc


def checked_column(column: pa.Array, path: SourcePath, first_row: int) -> pa.Array:
    """``column`` once its buffers and offsets are known to lie inside it; SourceError otherwise.

    The IPC reader takes lengths and offsets from the file as written, so a crafted file can point
    a string past its data (a read outside the mapping: a crash) or give a negative length. The
    check reads the offsets but not the text: invalid UTF-8 is the finisher's to report under the
    ``on_invalid_utf8`` policy, so a string column is checked through its binary twin."""
    kind = column.type
    twin = {pa.string(): pa.binary(), pa.large_string(): pa.large_binary(), pa.string_view(): pa.binary_view()}
    try:
        column.validate()
        (column.view(twin[kind]) if kind in twin else column).validate(full=True)
    except pa.ArrowException as exc:
        raise SourceError(
            str(path), f"malformed column in the record batch holding row {first_row} ({exc}); re-export the file"
        ) from exc
    return column


def byte_slices(column: pa.Array, batch_bytes: int) -> Iterator[tuple[int, pa.Array]]:
    """``(first row, slice)`` of ``column``, each slice about ``batch_bytes`` of text."""
    lengths = pc.fill_null(pc.binary_length(column), 0).to_numpy(zero_copy_only=False)
    ends = np.cumsum(lengths, dtype=np.int64)
    start = 0
    while start < len(column):
        before = int(ends[start - 1]) if start else 0
        stop = int(np.searchsorted(ends, before + batch_bytes, side="right"))
        stop = max(stop, start + 1)
        yield start, column.slice(start, stop - start)
        start = stop


def _as_large_string(column: pa.Array) -> pa.Array:
    if pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    if not pa.types.is_large_string(column.type):
        column = column.cast(pa.large_string())
    return column


def _valid_utf8(column: pa.Array) -> bool:
    try:
        column.validate(full=True)
    except pa.ArrowInvalid:
        return False
    return True


def finish_column(column: pa.Array, first_row: int, source: RecordSource, finisher: DocumentFinisher) -> pa.Array:
    """The documents of one batch of text values (rows from ``first_row`` on)."""
    column = _as_large_string(column)
    lengths = pc.binary_length(column)
    finisher.stats.bytes_read += int(pc.sum(lengths).as_py() or 0)
    oversize = bool(pc.any(pc.greater(lengths, source.max_document_bytes)).as_py())
    if column.null_count == 0 and not oversize and _valid_utf8(column):
        if source.line_ends != "keep" and pc.any(pc.match_substring(column, "\r")).as_py():
            column = pc.replace_substring(pc.replace_substring(column, "\r\n", "\n"), "\r", "\n")
        blank = pc.match_substring_regex(column, _BLANK_RE2)
        finisher.stats.blank_skipped += int(pc.sum(blank).as_py() or 0)
        out: pa.Array = column.filter(pc.invert(blank))
        return out
    docs = []
    for i, value in enumerate(column.cast(pa.large_binary()).to_pylist()):
        row = first_row + i
        if value is None:
            if source.on_bad_record == "error":
                raise finisher.error(
                    RecordError,
                    f'field {source.field!r} is null; set on_bad_record = "skip" to drop such records',
                    row=row,
                )
            finisher.stats.bad_records_skipped += 1
            continue
        text = finisher.finish(value, row=row)
        if text is not None:
            docs.append(text)
    return pa.array(docs, type=pa.large_string())
