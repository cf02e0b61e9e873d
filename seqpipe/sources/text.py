"""Plain text files: one document per file, per line, or per paragraph.

Line ends are LF, CRLF or a lone CR. A *blank* line holds only ASCII blanks
(space, tab, vertical tab, form feed). ``document = "line"``: every non-blank
line is a document. ``document = "paragraph"``: a document is a run of
non-blank lines; runs of blank lines separate documents. ``document = "file"``:
the whole file (after a leading byte order mark) is one document.

Reading works on bytes. The reader reads about ``batch_bytes`` at a time and cuts the
buffer after its last separator; the run of whole documents before the cut goes to the
vectorized path of ``_fast_text`` (numpy spans, one ``take`` into a ``large_string``
array, no Python object per document). When that path declines (an oversize document or
bytes that are not UTF-8, see ``_fast_text``) the exact path runs: separators found with
compiled ``re`` byte patterns (C), documents sliced out as memoryviews and finished one by
one by ``DocumentFinisher``. The read buffer holds
about ``batch_bytes`` plus the document being read; a document found to exceed
``max_document_bytes`` stops growing the buffer (its first ``max_document_bytes``
bytes are kept for ``on_oversize = "truncate"``).
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa

from seqpipe._parse import parse_int, parse_str
from seqpipe.filesystem import SourcePath, file_size, is_uri
from seqpipe.sources._fast_text import document_spans, fast_documents, last_paragraph_cut
from seqpipe.sources._stream import (
    COMPRESSIONS,
    codec_for,
    drop_front,
    plan_cuts,
    plan_stream_cuts,
    read_blocks,
    take_input,
)
from seqpipe.sources.base import DEFAULT_BATCH_BYTES, DocumentFinisher, Part, ReadStats, Source, to_array

DOCUMENT_MODES: Final = ("file", "line", "paragraph")

# Atomic group: "\r\n" is one line end, never a CR line end followed by an LF line end.
_LE: Final = rb"(?>\r\n|\r|\n)"
PARAGRAPH_SEPARATOR: Final = re.compile(_LE + rb"(?:[ \t\x0b\x0c]*+" + _LE + rb")+")
# The same where no CR occurs: a literal first byte lets re skip ahead with a fast search,
# which the alternation above does not allow.
_PARAGRAPH_SEPARATOR_LF: Final = re.compile(rb"\n(?:[ \t\x0b\x0c]*+\n)+")
LINE_SEPARATOR: Final = re.compile(rb"[\r\n]+")
_LINE: Final = re.compile(rb"[^\r\n]+")
_BLANK_RUN: Final = re.compile(rb"[ \t\x0b\x0c\r\n]*")
_NONBLANK: Final = re.compile(rb"[^ \t\x0b\x0c\r\n]")
_BACK_STEP: Final = 4096

Buffer = bytes | bytearray


def _line_start(buf: Buffer, lo: int, pos: int) -> int:
    """Start of the line holding ``pos``, not before ``lo``."""
    return max(buf.rfind(b"\n", lo, pos), buf.rfind(b"\r", lo, pos), lo - 1) + 1


def _last_nonblank_end(buf: Buffer, lo: int, hi: int) -> int:
    """One past the last non-blank byte in ``buf[lo:hi]`` (``lo`` if there is none)."""
    while hi > lo:
        lo_step = max(lo, hi - _BACK_STEP)
        kept = len(buf[lo_step:hi].rstrip())
        if kept:
            return lo_step + kept
        hi = lo_step
    return lo


def _separator(buf: Buffer, lo: int, hi: int) -> re.Pattern[bytes]:
    return PARAGRAPH_SEPARATOR if buf.find(b"\r", lo, hi) >= 0 else _PARAGRAPH_SEPARATOR_LF


def line_spans(buf: Buffer, end: int) -> list[tuple[int, int]]:
    """``(start, stop)`` of every non-blank line in ``buf[:end]``."""
    spans = []
    for match in _LINE.finditer(buf, 0, end):
        start, stop = match.span()
        if _NONBLANK.search(buf, start, stop) is not None:
            spans.append((start, stop))
    return spans


def paragraph_spans(buf: Buffer, end: int) -> list[tuple[int, int]]:
    """``(start, stop)`` of every paragraph in ``buf[:end]`` (line end of its last line excluded)."""
    gaps = []
    prev = 0
    for match in _separator(buf, 0, end).finditer(buf, 0, end):
        gaps.append((prev, match.start()))
        prev = match.end()
    gaps.append((prev, end))
    # The separator match is greedy, so only the first gap can start with blank lines
    # and only the last can end with a line end (plus a blank last line).
    start, stop = gaps[0]
    first = _NONBLANK.search(buf, start, stop)
    gaps[0] = (stop, stop) if first is None else (_line_start(buf, start, first.start()), stop)
    start, stop = gaps[-1]
    body = _last_nonblank_end(buf, start, stop)
    ends = [k for k in (buf.find(b"\n", body, stop), buf.find(b"\r", body, stop)) if k >= 0]
    gaps[-1] = (start, min(ends) if ends else stop)
    return [(a, b) for a, b in gaps if b > a]


def _last_line_cut(buf: Buffer, frm: int) -> int:
    return max(buf.rfind(b"\n", frm), buf.rfind(b"\r", frm)) + 1


def _last_paragraph_cut_re(buf: Buffer, frm: int) -> int:
    cut = 0
    for match in _separator(buf, frm, len(buf)).finditer(buf, frm):
        cut = match.end()
    return cut


@dataclass(frozen=True, slots=True)
class TextSource(Source):
    """Recipe ``kind = "text"``: UTF-8 text files, optionally compressed (gzip, bz2, zstd)."""

    kind: ClassVar[str] = "text"

    document: str = "file"
    compression: str = "auto"
    max_input_bytes: int = 0

    def __post_init__(self) -> None:
        Source.__post_init__(self)
        parse_str("document", self.document, choices=DOCUMENT_MODES)
        parse_str("compression", self.compression, choices=COMPRESSIONS)
        parse_int("max_input_bytes", self.max_input_bytes, minimum=0)

    def plan(self, path: SourcePath, target_bytes: int) -> list[Part]:
        """Byte ranges cut just after a line end (line mode) or a blank line (paragraph mode).

        ``document = "file"`` is one part. A compressed file is cut into parts of the decompressed
        stream as it is decompressed (see ``plan_stream_cuts``), so memory stays bounded by the
        part size whatever the compression ratio; ``max_input_bytes`` limits its decompressed size.
        """
        parse_int("target_bytes", target_bytes, minimum=1)
        codec = codec_for(path, self.compression)
        separator = LINE_SEPARATOR if self.document == "line" else PARAGRAPH_SEPARATOR
        if codec is not None and self.document != "file":
            cuts = plan_stream_cuts(path, codec, target_bytes, separator, self.max_input_bytes)
            return [Part(a, b) for a, b in cuts]
        if codec is not None or self.document == "file":
            if codec is not None and self.max_input_bytes:
                plan_stream_cuts(path, codec, 1 << 62, separator, self.max_input_bytes)  # the size check only
            return [Part(0, None)]
        size = file_size(path)
        return [Part(a, b) for a, b in plan_cuts(path, size, target_bytes, separator)]

    def plan_sized(self, path: SourcePath, size: int, target_bytes: int) -> list[Part] | None:
        """:meth:`plan` of an uncompressed file: read whole (file documents), else one part
        ``[0, size)`` when ``size`` is at most ``target_bytes`` (``plan_cuts`` cuts nothing)."""
        if codec_for(path, self.compression) is not None:
            return None
        if self.document == "file":
            return [Part(0, None)]
        return [Part(0, size)] if size <= target_bytes else None

    def read(
        self, path: SourcePath, part: Part, stats: ReadStats, *, batch_bytes: int = DEFAULT_BATCH_BYTES
    ) -> Iterator[pa.Array]:
        """Documents of ``part`` (see the module docstring for what a document is)."""
        parse_int("batch_bytes", batch_bytes, minimum=1)
        if self.document == "file":
            return self._read_file(path, part, stats, batch_bytes)
        return self._read_split(path, part, stats, batch_bytes)

    def read_many(
        self,
        parts: Sequence[tuple[SourcePath, Part]],
        stats: ReadStats,
        counts: list[int],
        *,
        batch_bytes: int = DEFAULT_BATCH_BYTES,
    ) -> Iterator[pa.Array]:
        """:meth:`Source.read_many`, reading runs of whole small plain local files (line and
        paragraph documents) as one buffer, a separator between files, through the vectorized
        path: a file costs a read, not a reader. A run the vectorized path declines (a CR, an
        oversize document, bytes that are not UTF-8) is read file by file, as are other parts."""
        run: list[tuple[SourcePath, Part]] = []
        held = 0
        for path, part in parts:
            if not self._joinable(path, part, batch_bytes):
                yield from self._read_run(run, stats, counts, batch_bytes)
                run, held = [], 0
                yield from Source.read_many(self, [(path, part)], stats, counts, batch_bytes=batch_bytes)
                continue
            run.append((path, part))
            held += part.stop or 0
            if held >= batch_bytes:
                yield from self._read_run(run, stats, counts, batch_bytes)
                run, held = [], 0
        yield from self._read_run(run, stats, counts, batch_bytes)

    def _joinable(self, path: SourcePath, part: Part, batch_bytes: int) -> bool:
        """A part that is a small whole plain local file of line or paragraph documents."""
        return (
            self.document != "file"
            and part.start == 0
            and part.stop is not None
            and part.stop <= batch_bytes
            and not is_uri(path)
            and codec_for(path, self.compression) is None
        )

    def _read_run(
        self, run: list[tuple[SourcePath, Part]], stats: ReadStats, counts: list[int], batch_bytes: int
    ) -> Iterator[pa.Array]:
        if not run:
            return
        joined = _joined_documents(run, self.document == "paragraph", self.max_document_bytes)
        if joined is None:
            yield from Source.read_many(self, run, stats, counts, batch_bytes=batch_bytes)
            return
        docs, per_file, read = joined
        stats.bytes_read += read
        stats.documents += len(docs)
        counts.extend(per_file)
        if len(docs):
            yield docs

    def _read_file(self, path: SourcePath, part: Part, stats: ReadStats, batch_bytes: int) -> Iterator[pa.Array]:
        codec = codec_for(path, self.compression)
        finisher = DocumentFinisher(self, path, stats, compressed=codec is not None)
        limit = self.max_document_bytes
        head = bytearray()  # at most limit + 1 bytes: enough to decide and to truncate
        total = 0
        content = False  # a non-blank byte seen: a blank file is no document, whatever its size
        start = part.start
        seen = part.start
        for offset, block in read_blocks(path, codec, part.start, part.stop, batch_bytes):
            if seen == part.start:
                start = offset
            stats.bytes_read += offset + len(block) - seen  # a byte order mark counts too
            seen = offset + len(block)
            total += len(block)
            content = content or _NONBLANK.search(block) is not None
            if len(head) <= limit:
                head += block[: limit + 1 - len(head)]
        if not content:
            return
        if total > limit and self.on_oversize == "error":
            raise finisher.oversize_error(total, offset=start)
        text = finisher.finish(head, offset=start)
        if text is not None:
            yield to_array([text], stats)

    def _read_split(
        self, path: SourcePath, part: Part, stats: ReadStats, batch_bytes: int, *, slow: bool = False
    ) -> Iterator[pa.Array]:
        """``slow`` keeps to the per-document path (the tests compare it with the vectorized one)."""
        codec = codec_for(path, self.compression)
        finisher = DocumentFinisher(self, path, stats, compressed=codec is not None)
        reader = _SplitReader(self, finisher, _Window(base=part.start), slow=slow)
        seen = part.start
        for offset, block in read_blocks(path, codec, part.start, part.stop, batch_bytes):
            stats.bytes_read += offset + len(block) - seen  # a byte order mark counts too
            seen = offset + len(block)
            batch = reader.feed(block, offset)
            if batch is not None:
                yield batch
        batch = reader.finish()
        if batch is not None:
            yield batch

    def _chunk(
        self, buf: bytearray, cut: int, base: int, finisher: DocumentFinisher, *, slow: bool = False
    ) -> pa.Array:
        """The documents of ``buf[:cut]``, a run of whole documents starting at offset ``base``.

        ``slow`` skips the vectorized path (the tests compare the two).
        """
        if not slow:
            fast = fast_documents(
                buf, cut, self.document == "paragraph", self.max_document_bytes, keep_cr=self.line_ends == "keep"
            )
            if fast is not None:
                finisher.stats.documents += len(fast)
                return fast
        with memoryview(buf) as view:
            spans = line_spans(buf, cut) if self.document == "line" else paragraph_spans(buf, cut)
            docs = []
            for start, stop in spans:
                # a run of blanks with no line end after it (the end of the input) is no
                # document, whatever its size: the vectorized path never sees it either
                if _BLANK_RUN.fullmatch(view[start:stop]) is not None:
                    continue
                text = finisher.finish(view[start:stop], offset=base + start)
                if text is not None:
                    docs.append(text)
        return to_array(docs, finisher.stats)


_BOM: Final = b"\xef\xbb\xbf"


def _joined_documents(
    run: list[tuple[SourcePath, Part]], paragraphs: bool, limit: int
) -> tuple[pa.Array, list[int], int] | None:
    """The documents of whole plain files read as one buffer (each file's byte order mark
    dropped, as ``read_blocks`` does, and a separator after each, so no document spans two
    files), how many each file gave, and the bytes read; None where the vectorized path
    declines or a file cannot be read, so the exact reader (and its errors) decide."""
    pieces: list[bytes] = []
    read = 0
    for path, part in run:
        data = take_input(path)
        if data is not None:
            data = data[: part.stop]
        else:
            try:
                with open(path, "rb") as fh:
                    data = fh.read(part.stop)
            except OSError:
                return None
        read += len(data)
        pieces.append(data[3:] if data.startswith(_BOM) else data)
    separator = b"\n\n" if paragraphs else b"\n"
    buf = separator.join(pieces) + separator
    if b"\r" in buf:
        return None
    spans = document_spans(np.frombuffer(buf, np.uint8), paragraphs, False)
    docs = fast_documents(buf, len(buf), paragraphs, limit, spans=spans)
    if docs is None:
        return None
    lengths = np.array([len(p) + len(separator) for p in pieces], np.int64)
    starts = spans[0]
    first = np.searchsorted(starts, np.cumsum(lengths) - lengths)
    per_file = np.diff(first, append=len(starts))
    return docs, per_file.tolist(), read


@dataclass(slots=True)
class _Window:
    """The read buffer of a line or paragraph reader and what is known about its bytes."""

    base: int  # absolute offset of buf[0]
    buf: bytearray = field(default_factory=bytearray)
    tail: int = 0  # buf[tail:] is all ASCII whitespace: a separator may be starting there
    first: int | None = None  # first non-blank byte of the document being read
    first_scan: int = 0  # where the search for ``first`` resumes

    def add(self, block: bytes, offset: int | None) -> int:
        """Append ``block`` (read at ``offset``; None at the end of input) and return where a
        separator ending in it can start: at or after the old blank tail."""
        if offset is not None:
            self.base = offset - len(self.buf)
        frm = self.tail
        old = len(self.buf)
        self.buf += block
        body = len(block.rstrip())
        if body:
            self.tail = old + body
        return frm

    def drop(self, n: int) -> None:
        """Forget the first ``n`` bytes; the document being read starts afresh after them."""
        self.buf = drop_front(self.buf, n)
        self.base += n
        self.tail = max(0, self.tail - n)
        self.first, self.first_scan = None, 0

    def document_start(self) -> int | None:
        """The first non-blank byte of the document being read, if one has arrived."""
        if self.first is None:
            found = _NONBLANK.search(self.buf, self.first_scan)
            self.first, self.first_scan = (None, len(self.buf)) if found is None else (found.start(), 0)
        return self.first


@dataclass(slots=True)
class _SplitReader:
    """Cuts a stream of blocks into batches of whole documents (``document = "line"`` or
    ``"paragraph"``): each block is added, an oversize document being skipped is passed over,
    the whole documents before the last separator are cut off, and a document that has grown
    past ``max_document_bytes`` is refused, truncated or skipped."""

    source: TextSource
    finisher: DocumentFinisher
    window: _Window
    slow: bool = False
    skipping: bool = False  # inside an oversize document, dropping bytes up to its end
    kept: bytes | None = None  # its first limit + 1 bytes, for on_oversize = "truncate"
    kept_at: int = 0

    @property
    def separator(self) -> re.Pattern[bytes]:
        return LINE_SEPARATOR if self.source.document == "line" else PARAGRAPH_SEPARATOR

    def feed(self, block: bytes, offset: int) -> pa.Array | None:
        """The documents completed by ``block`` (read at ``offset``), if any."""
        return self._step(block, offset)

    def finish(self) -> pa.Array | None:
        """The documents left at the end of the input."""
        return self._step(b"", None)

    def _step(self, block: bytes, offset: int | None) -> pa.Array | None:
        eof = offset is None
        window = self.window
        frm = window.add(block, offset)
        out: list[pa.Array] = []
        if self.skipping:
            end = self._oversize_end(eof)
            if end is None:
                window.drop(window.tail)
                return None
            out.extend(self._leave_oversize(end))
            frm = 0
        cut = len(window.buf) if eof else self._last_cut(frm)
        if cut:
            out.append(self.source._chunk(window.buf, cut, window.base, self.finisher, slow=self.slow))
            window.drop(cut)
        if not eof:
            self._check_growing_document()
        batch = out[0] if len(out) == 1 else pa.concat_arrays(out) if out else None
        return batch if batch is not None and len(batch) else None

    def _last_cut(self, frm: int) -> int:
        """One past the last separator in the buffer that ends at or after ``frm`` (0: none)."""
        if self.source.document == "line":
            return _last_line_cut(self.window.buf, frm)
        if self.slow:
            return _last_paragraph_cut_re(self.window.buf, frm)
        return last_paragraph_cut(self.window.buf, frm)

    def _oversize_end(self, eof: bool) -> int | None:
        """Where the oversize document being skipped ends, or None while it goes on."""
        match = self.separator.search(self.window.buf)
        if match is None:
            return len(self.window.buf) if eof else None
        return match.end()

    def _leave_oversize(self, end: int) -> list[pa.Array]:
        """Drop the skipped document's last bytes; its kept head, when truncating."""
        out = []
        if self.kept is not None:
            text = self.finisher.finish(self.kept, offset=self.kept_at)
            out.append(to_array([] if text is None else [text], self.finisher.stats))
            self.kept = None
        self.skipping = False
        self.window.drop(end)
        return out

    def _check_growing_document(self) -> None:
        """Refuse, keep the head of, or count a document that has grown past the limit."""
        window = self.window
        first = window.document_start()
        limit = self.source.max_document_bytes
        # buf[first:tail] holds no separator, so it lies inside one document.
        if first is None or window.tail - first <= limit:
            return
        start = _line_start(window.buf, 0, first)
        if self.source.on_oversize == "error":
            raise self.finisher.oversize_error(None, offset=window.base + start)
        if self.source.on_oversize == "truncate":
            self.kept, self.kept_at = bytes(window.buf[start : start + limit + 1]), window.base + start
        else:
            self.finisher.stats.oversize_skipped += 1
        self.skipping = True
        window.drop(window.tail)
