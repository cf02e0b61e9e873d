"""JSON Lines files: one JSON object per LF-terminated line, the text in one string field.

Lines are found in the read buffer with ``bytes.find`` (C) and each is parsed
with the standard library's C-accelerated ``json.loads`` (RFC 8259 JSON): a
per-record Python call, the least work that still names the line of a bad
record. Blank lines are skipped. Errors name the file and the line number
(1-based, counted in the decompressed stream); for parts that start past the
beginning of a file, the lines before the part are counted only when an error
needs the number.

A line longer than ``4 * max_document_bytes + 64 KiB`` is judged oversize
without being parsed, so a single huge line cannot fill memory; with
``on_oversize = "truncate"`` such a record is skipped (there is no text to cut
before it is parsed) and counted in ``oversize_skipped``.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import ClassVar, Final

import pyarrow as pa

from seqpipe._parse import parse_int, parse_str
from seqpipe.errors import RecordError
from seqpipe.filesystem import SourcePath, file_size
from seqpipe.sources._stream import COMPRESSIONS, codec_for, drop_front, plan_cuts, plan_stream_cuts, read_blocks
from seqpipe.sources.base import (
    DEFAULT_BATCH_BYTES,
    DocumentFinisher,
    Part,
    ReadStats,
    RecordSource,
    to_array,
)

_LINE_SLACK: Final = 1 << 16
_LF: Final = re.compile(rb"\n")
_NONBLANK: Final = re.compile(rb"[^ \t\x0b\x0c\r\n]")


def _count_lines_before(path: SourcePath, offset: int, codec: str | None) -> int:
    """Number of LF bytes in the first ``offset`` bytes of a file (of its decompressed stream)."""
    count = 0
    for _, block in read_blocks(path, codec, 0, offset, 8 << 20):
        count += block.count(b"\n")
    return count


# Python refuses to turn more than 4,300 digits into an int (sys.int_info.default_max_str_digits,
# a guard against quadratic-time conversion), which json.loads reports as a bare ValueError. Only
# the text field's value is used, so any integer can stand for a long one: its type is what counts.
_INT_DIGITS: Final = 4000


def _bounded_int(digits: str) -> int:
    return int(digits) if len(digits) <= _INT_DIGITS else 0


@dataclass(frozen=True, slots=True)
class JsonlSource(RecordSource):
    """Recipe ``kind = "jsonl"``: JSON Lines files, optionally compressed (gzip, bz2, zstd)."""

    kind: ClassVar[str] = "jsonl"

    compression: str = "auto"
    max_input_bytes: int = 0

    def __post_init__(self) -> None:
        RecordSource.__post_init__(self)
        parse_str("compression", self.compression, choices=COMPRESSIONS)
        parse_int("max_input_bytes", self.max_input_bytes, minimum=0)

    def plan(self, path: SourcePath, target_bytes: int) -> list[Part]:
        """Byte ranges cut just after a line end; a compressed file's ranges are of its decompressed
        stream, found as it decompresses (memory bounded by the part size; ``max_input_bytes``)."""
        parse_int("target_bytes", target_bytes, minimum=1)
        codec = codec_for(path, self.compression)
        if codec is not None:
            return [Part(a, b) for a, b in plan_stream_cuts(path, codec, target_bytes, _LF, self.max_input_bytes)]
        size = file_size(path)
        # Only LF ends a JSON Lines record (a CR before it is JSON whitespace).
        return [Part(a, b) for a, b in plan_cuts(path, size, target_bytes, _LF)]

    def plan_sized(self, path: SourcePath, size: int, target_bytes: int) -> list[Part] | None:
        """:meth:`plan` of an uncompressed file of at most ``target_bytes``: one part ``[0, size)``."""
        if codec_for(path, self.compression) is not None or size > target_bytes:
            return None
        return [Part(0, size)]

    def read(
        self, path: SourcePath, part: Part, stats: ReadStats, *, batch_bytes: int = DEFAULT_BATCH_BYTES
    ) -> Iterator[pa.Array]:
        """Text values of the records in ``part``."""
        parse_int("batch_bytes", batch_bytes, minimum=1)
        codec = codec_for(path, self.compression)
        first_line: list[int] = []

        def line_of(relative: int) -> int:
            if not first_line:
                first_line.append(_count_lines_before(path, part.start, codec) if part.start else 0)
            return first_line[0] + relative

        finisher = DocumentFinisher(self, path, stats, compressed=codec is not None, line_of=line_of)
        line_limit = 4 * self.max_document_bytes + _LINE_SLACK
        buf = bytearray()
        base = part.start
        lines = 0  # lines of the part before buf[0]
        skipping = False  # inside an oversize line
        frm = 0
        blocks = read_blocks(path, codec, part.start, part.stop, batch_bytes)
        seen = part.start
        eof = False
        while not eof:
            item = next(blocks, None)
            eof = item is None
            if item is not None:
                base = item[0] - len(buf)
                stats.bytes_read += item[0] + len(item[1]) - seen  # a byte order mark counts too
                seen = item[0] + len(item[1])
                buf += item[1]
            docs: list[str] = []
            if skipping:
                nl = buf.find(b"\n")
                if nl < 0 and not eof:
                    base += len(buf)
                    buf.clear()
                    continue
                end = len(buf) if nl < 0 else nl + 1
                buf = drop_front(buf, end)
                base += end
                lines += 1
                skipping = False
                frm = 0
            cut = len(buf) if eof else buf.rfind(b"\n", frm) + 1
            if cut:
                lines = self._records(buf, cut, base, lines, line_limit, finisher, docs)
                buf = drop_front(buf, cut)
                base += cut
            frm = len(buf)
            if not eof and len(buf) > line_limit:
                if self.on_oversize == "error":
                    raise finisher.oversize_error(None, offset=base, line=lines + 1)
                stats.oversize_skipped += 1
                skipping = True
                base += len(buf)
                buf.clear()
                frm = 0
            if docs:
                yield to_array(docs, stats)

    def _records(
        self,
        buf: bytearray,
        cut: int,
        base: int,
        lines: int,
        line_limit: int,
        finisher: DocumentFinisher,
        docs: list[str],
    ) -> int:
        """Append the texts of the lines in ``buf[:cut]``; return the updated line count."""
        pos = 0
        with memoryview(buf) as view:
            while pos < cut:
                nl = buf.find(b"\n", pos, cut)
                stop = cut if nl < 0 else nl
                lines += 1
                if stop - pos > line_limit:
                    if self.on_oversize == "error":
                        raise finisher.oversize_error(None, offset=base + pos, line=lines)
                    finisher.stats.oversize_skipped += 1
                elif _NONBLANK.search(buf, pos, stop) is not None:
                    text = self._record(view[pos:stop], base + pos, lines, finisher)
                    if text is not None:
                        docs.append(text)
                pos = stop + 1
        return lines

    def _record(self, data: memoryview, offset: int, line: int, finisher: DocumentFinisher) -> str | None:
        raw = finisher.decode(data, offset=offset, line=line)
        if raw is None:
            return None
        value, size, problem = self._text_of(raw)
        if problem is None:
            return finisher.finish_text(value, size, line=line)
        if self.on_bad_record == "error":
            hint = '; set on_bad_record = "skip" to drop such records'
            raise finisher.error(RecordError, problem + hint, line=line)
        finisher.stats.bad_records_skipped += 1
        return None

    def _text_of(self, raw: str) -> tuple[str, int, str | None]:
        """``(text, UTF-8 size, None)``, or ``("", 0, what is wrong)`` for a bad record."""
        try:
            obj = json.loads(raw, parse_int=_bounded_int)
        except json.JSONDecodeError as exc:
            return "", 0, f"not valid JSON ({exc.msg} at column {exc.colno})"
        except RecursionError:
            return "", 0, "JSON nested too deeply to parse"
        if not isinstance(obj, dict):
            return "", 0, f"expected a JSON object, got {type(obj).__name__}"
        if self.field not in obj:
            return "", 0, f"no field {self.field!r}"
        value = obj[self.field]
        if not isinstance(value, str):
            kind = "null" if value is None else type(value).__name__
            return "", 0, f"field {self.field!r} is {kind}, expected a string"
        try:
            size = len(value.encode("utf-8"))
        except UnicodeEncodeError:
            return "", 0, f"field {self.field!r} holds an unpaired surrogate escape"
        return value, size, None
