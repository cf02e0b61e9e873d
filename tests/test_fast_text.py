"""The vectorized text reader (seqpipe.sources._fast_text) against the exact per-document path.

The fast path is an optimization only: for every input, plan and batch size it must give the
same documents, the same counters and the same errors as the exact path. It declines (returns
None, so the exact path runs) on exactly two conditions: a document longer than
``max_document_bytes``, or a document whose bytes are not UTF-8. Everything else -- CR and
CRLF line ends, blank lines of spaces/tabs/VT/FF, NULs, a byte order mark at the start (dropped
by the stream) or in the middle (the character U+FEFF, content) -- it handles itself.

Outside references: Python's UTF-8 codec (``bytes.decode``, which follows RFC 3629 / the
Unicode Standard ch. 3 on well-formed UTF-8) decides what "valid UTF-8" means here, and the
stdlib ``gzip`` writer makes the compressed inputs.
"""

from __future__ import annotations

import gzip
import re
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from seqpipe.errors import SourceError
from seqpipe.sources import ReadStats, TextSource
from seqpipe.sources._fast_text import document_spans, fast_documents, last_paragraph_cut
from seqpipe.sources.base import DocumentFinisher, Part
from seqpipe.sources.text import _last_paragraph_cut_re

# A rich alphabet: letters, every blank, every line end, multi-byte characters, a BOM (which
# may land at the start of the file or in the middle), NUL, and bytes that are not UTF-8
# (a lone continuation byte, 0xFF, a truncated three-byte sequence).
_TOKENS = [
    b"a",
    b"Zq",
    b" ",
    b"\t",
    b"\x0b",
    b"\x0c",
    b"\n",
    b"\n",
    b"\r",
    b"\r\n",
    b"\n\n",
    b"  \n",
    b"\xc3\xa9",
    b"\xe2\x82\xac",
    b"\xf0\x9f\x9a\xa2",
    b"\xef\xbb\xbf",
    b"\x00",
]
_BAD = [b"\x80", b"\xff", b"\xe2\x82"]
_valid = st.lists(st.sampled_from(_TOKENS), max_size=120).map(b"".join)
_any = st.lists(st.sampled_from(_TOKENS + _BAD), max_size=120).map(b"".join)
_mixed = st.one_of(_valid, _any)
_SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _source(mode: str, **options: Any) -> TextSource:
    return TextSource(paths="a.txt", document=mode, **options)


def _read(src: TextSource, path: Path, parts: list[Part], batch: int, slow: bool) -> tuple[Any, ...]:
    """Documents and counters of every part, or the error raised (class, offset, message)."""
    stats = ReadStats()
    docs: list[str | None] = []
    try:
        for part in parts:
            for array in src._read_split(path, part, stats, batch, slow=slow):
                assert array.type == pa.large_string()
                docs.extend(array.to_pylist())
    except SourceError as exc:
        return ("error", type(exc), exc.offset, str(exc))
    return ("ok", docs, stats.as_dict())


@_SETTINGS
@given(
    data=_mixed,
    mode=st.sampled_from(["line", "paragraph"]),
    target=st.integers(1, 64),
    batch=st.integers(1, 64),
    limit=st.sampled_from([1, 3, 8, 40, 1 << 20]),
    oversize=st.sampled_from(["error", "skip", "truncate"]),
    invalid=st.sampled_from(["error", "replace", "skip"]),
    compressed=st.booleans(),
)
def test_fast_reader_equals_exact_reader(
    data: bytes, mode: str, target: int, batch: int, limit: int, oversize: str, invalid: str, compressed: bool
) -> None:
    """Fast and exact readers give the same documents, counters and errors for any bytes and cuts."""
    src = _source(mode, max_document_bytes=limit, on_oversize=oversize, on_invalid_utf8=invalid)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / ("a.txt.gz" if compressed else "a.txt")
        path.write_bytes(gzip.compress(data) if compressed else data)
        parts = src.plan(path, target)
        assert _read(src, path, parts, batch, slow=False) == _read(src, path, parts, batch, slow=True)


def _exact_chunk(data: bytes, mode: str, limit: int) -> tuple[list[str], dict[str, int]]:
    stats = ReadStats()
    src = _source(mode, max_document_bytes=limit, on_oversize="skip", on_invalid_utf8="replace")
    out = src._chunk(bytearray(data), len(data), 0, DocumentFinisher(src, Path("a.txt"), stats), slow=True)
    return out.to_pylist(), stats.as_dict()


@_SETTINGS
@given(data=_mixed, mode=st.sampled_from(["line", "paragraph"]), limit=st.sampled_from([2, 8, 1 << 20]))
# trailing blanks with no line end, longer than the limit: no document on either path (once
# counted as an oversize document by the exact path)
@example(data=b"\n\n   ", mode="paragraph", limit=2)
def test_fast_chunk_equals_exact_chunk_or_declines(data: bytes, mode: str, limit: int) -> None:
    """On any chunk the fast path returns the exact documents, or declines for one of its two reasons."""
    want, stats = _exact_chunk(data, mode, limit)
    got = fast_documents(bytearray(data), len(data), mode == "paragraph", limit)
    if got is None:
        assert stats["oversize_skipped"] + stats["invalid_utf8_replaced"] > 0
    else:
        assert got.type == pa.large_string()
        assert got.to_pylist() == want
        assert stats["oversize_skipped"] == stats["invalid_utf8_replaced"] == 0


@_SETTINGS
@given(data=_valid, mode=st.sampled_from(["line", "paragraph"]))
def test_fast_path_takes_valid_text_with_any_line_ends(data: bytes, mode: str) -> None:
    """Valid UTF-8 with CR, CRLF, blanks, NULs and BOMs is never sent to the exact path."""
    # Python's UTF-8 codec is the reference for validity (RFC 3629): the alphabet is valid.
    data.decode("utf-8")
    assert fast_documents(bytearray(data), len(data), mode == "paragraph", 1 << 20) is not None


@settings(max_examples=100, deadline=None)
@given(data=_valid, bad=st.sampled_from(_BAD), at=st.integers(0, 200), mode=st.sampled_from(["line", "paragraph"]))
def test_fast_path_declines_bytes_that_are_not_utf8(data: bytes, bad: bytes, at: int, mode: str) -> None:
    """A byte sequence Python's UTF-8 codec rejects anywhere in the chunk sends it to the exact path."""
    at = min(at, len(data))
    data = data[:at] + bad + data[at:]
    with pytest.raises(UnicodeDecodeError):  # the reference: RFC 3629 as CPython implements it
        data.decode("utf-8")
    assert fast_documents(bytearray(data), len(data), mode == "paragraph", 1 << 20) is None


def test_fast_path_declines_an_oversize_document_only() -> None:
    """A document one byte over the limit is declined; at the limit it is taken."""
    data = b"abcd\n\nefgh\r\nij\n"
    assert fast_documents(data, len(data), True, 8) == pa.array(["abcd", "efgh\nij"], pa.large_string())
    assert fast_documents(data, len(data), True, 7) is None
    assert fast_documents(data, len(data), False, 4) == pa.array(["abcd", "efgh", "ij"], pa.large_string())
    assert fast_documents(data, len(data), False, 3) is None


def test_line_ends_blank_lines_and_bom_in_the_middle() -> None:
    """CR, CRLF and LF end lines; a CRLF is one line end; U+FEFF mid-stream is content."""
    # "\r\r\n" is a CR line end then a CRLF line end (common practice: CRLF is a single line end),
    # so it separates paragraphs; "\r\n\r\n" likewise; a line of blanks is a separator too.
    data = b"one\r\rtwo\r\r\nthree\r\nfour\r\n\r\n\xef\xbb\xbffive\n \t\x0b\x0c\nsix\x00\n"
    got = fast_documents(data, len(data), True, 100)
    assert got is not None
    assert got.to_pylist() == ["one", "two", "three\nfour", "\ufefffive", "six\x00"]
    lines = fast_documents(data, len(data), False, 100)
    assert lines is not None
    assert lines.to_pylist() == ["one", "two", "three", "four", "\ufefffive", "six\x00"]


def test_result_does_not_keep_the_buffer_exported() -> None:
    """After a fast read the caller can resize its bytearray (no view of it is left alive)."""
    buf = bytearray(b"alpha\n\nbeta\n\n" * 100)
    got = fast_documents(buf, len(buf), True, 1 << 20)
    assert got is not None
    del buf[:7]  # raises BufferError if an export were still alive
    buf[:] = b"x" * len(buf)
    assert got.to_pylist()[:2] == ["alpha", "beta"]


@_SETTINGS
@given(
    data=st.lists(
        st.sampled_from([b"a", b" ", b"\t", b"\x0c", b"\n", b"\n\n", b"\r", b"\r\n", b"\xc3\xa9"]), max_size=200
    ).map(b"".join),
    frm=st.integers(0, 250),
)
def test_last_paragraph_cut_equals_the_separator_regex(data: bytes, frm: int) -> None:
    """The numpy search for the last separator ends where the separator regex's last match does."""
    frm = min(frm, len(data))
    assert last_paragraph_cut(data, frm) == _last_paragraph_cut_re(data, frm)


def test_last_paragraph_cut_with_cr_line_ends() -> None:
    """CRLF is one line end, a lone CR another; a scan start on the LF of a CRLF sees a line end."""
    assert last_paragraph_cut(b"a\r\n\r\nb", 0) == 5
    assert last_paragraph_cut(b"a\r\rb\r\n \r\nc", 0) == 9 == _last_paragraph_cut_re(b"a\r\rb\r\n \r\nc", 0)
    assert last_paragraph_cut(b"a\r\nb", 0) == 0
    assert last_paragraph_cut(b"a\r\n\nb", 2) == 4 == _last_paragraph_cut_re(b"a\r\n\nb", 2)


def test_long_window_search_finds_an_early_separator() -> None:
    """The growing search window still finds a separator far before the end of the buffer."""
    data = b"head\n\n" + b"word " * 100_000 + b"\nmore"
    assert last_paragraph_cut(data, 0) == 6 == _last_paragraph_cut_re(data, 0)
    assert last_paragraph_cut(data, 1) == 6
    assert last_paragraph_cut(data, 5) == 0


def test_spans_match_a_regex_over_lines() -> None:
    """Line-mode spans are the runs of bytes without CR/LF that hold a non-blank byte."""
    rng = np.random.default_rng(5)
    alphabet = np.frombuffer(b"ab \t\r\n\n\x0b\x0c\x00", dtype=np.uint8)
    for _ in range(50):
        data = alphabet[rng.integers(0, len(alphabet), 300)].tobytes()
        # common practice: a line is a maximal run of bytes other than CR and LF
        want = [m.span() for m in re.finditer(rb"[^\r\n]+", data) if m.group().strip(b" \t\x0b\x0c")]
        starts, stops = document_spans(np.frombuffer(data, dtype=np.uint8), False, b"\r" in data)
        assert list(zip(starts.tolist(), stops.tolist(), strict=True)) == want


def test_read_buffer_survives_a_live_view() -> None:
    """Dropping consumed bytes works even while a view of the read buffer is alive (copy instead
    of the in-place resize, which would raise BufferError)."""
    import numpy as np

    from seqpipe.sources._stream import drop_front

    buf = bytearray(b"first doc\n\nsecond doc\n")
    view = np.frombuffer(buf, dtype=np.uint8)  # an export, as numpy or Arrow may still hold one
    rest = drop_front(buf, 11)
    assert bytes(rest) == b"second doc\n"
    assert bytes(view[:5]) == b"first"  # the old buffer is untouched while viewed
    del view
    assert bytes(drop_front(rest, 7)) == b"doc\n"
