"""Vectorized text reading for ``document = "line"`` and ``"paragraph"``: no Python object per document.

The per-document rules of :class:`~seqpipe.sources.base.DocumentFinisher` reduce, for an
*ordinary* chunk, to slicing: every document is non-blank by construction, fits the size
limit and is valid UTF-8, so the only rewrite left is CRLF/CR -> LF inside paragraphs. Here
the line ends, the blank lines and the document spans are numpy arrays over the chunk's
bytes, and the documents are one ``large_string`` array cut out of them by ``take`` (C,
which copies the bytes). The text reader calls :func:`fast_documents` first and uses its
exact per-document path whenever it returns None; it finds where to cut its read buffer in
paragraph mode with :func:`last_paragraph_cut` (same answer as its separator regex).

Fallback conditions (None is returned, nothing is counted), so that every policy decision
stays with the exact path:

- a document longer than ``max_document_bytes`` (skip / truncate / error policies);
- bytes that are not UTF-8 in any document (replace / skip / error policies, error offsets).

Nothing else needs a fallback: a byte order mark at the start of a stream is dropped before
the reader sees it (``read_blocks``), one anywhere else is the valid character U+FEFF and
content for both paths; NUL and other control bytes are content; compressed streams reach
this code already decompressed. Blank lines and the bytes between documents are ASCII, so
a multi-byte character never straddles a document boundary and checking the documents'
UTF-8 equals checking the chunk's.
"""

from __future__ import annotations

from typing import Final

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.compute as pc

_LF: Final = 10
_CR: Final = 13
# Bytes of a blank line besides its line end: space, tab, vertical tab, form feed.
_BLANK: Final = np.zeros(256, dtype=np.bool_)
_BLANK[[9, 11, 12, 32]] = True

Int64s = npt.NDArray[np.int64]
Bools = npt.NDArray[np.bool_]
Bytes = npt.NDArray[np.uint8]


def line_table(a: Bytes, has_cr: bool) -> tuple[Int64s, Int64s]:
    """``(starts, stops)`` of every line of ``a``, line ends (LF, CRLF, lone CR) excluded.

    The last line runs to the end of ``a`` and may be empty (``a`` ends with a line end).
    ``has_cr`` says whether ``a`` holds a CR (the caller finds out with ``bytes.find``).
    """
    # ``|=`` into the first mask: one chunk-sized temporary fewer, as fresh memory costs page
    # faults (DEVELOPERS.md has what it measured to).
    if not has_cr:
        ends = np.flatnonzero(a == _LF)
        return np.concatenate(([0], ends + 1)), np.concatenate((ends, [len(a)]))
    mask = a == _CR
    mask |= a == _LF
    ends = np.flatnonzero(mask)
    del mask
    at = a[ends]
    # "\r\n" is one line end: drop its LF, and the line after it starts two bytes on.
    crlf_lf = (at == _LF) & (ends > 0) & (a[np.maximum(ends - 1, 0)] == _CR)
    ends, at = ends[~crlf_lf], at[~crlf_lf]
    width = np.ones(len(ends), dtype=np.int64)
    after = a[np.minimum(ends + 1, len(a) - 1)]
    width[(at == _CR) & (ends + 1 < len(a)) & (after == _LF)] = 2
    return np.concatenate(([0], ends + width)), np.concatenate((ends, [len(a)]))


def nonblank_lines(a: Bytes, starts: Int64s, stops: Int64s) -> Bools:
    """True for each line ``a[starts[i]:stops[i]]`` holding a byte other than ASCII blanks.

    Lines hold no line-end bytes and do not overlap. Most lines start with a non-blank byte;
    only the others are scanned, with one ``reduceat`` over a byte mask.
    """
    out = stops > starts
    idx = np.flatnonzero(out)
    check = idx[_BLANK[a[starts[idx]]]]
    if len(check):
        lo, hi = starts[check], stops[check]
        bounds = np.empty(2 * len(check), dtype=np.int64)
        bounds[0::2] = lo
        bounds[1::2] = hi
        if bounds[-1] >= len(a):  # reduceat indices must be in range; the last span runs to the end
            bounds = bounds[:-1]
        nonblank = ~_BLANK[a]
        out[check] = np.logical_or.reduceat(nonblank, bounds)[0::2]
    return out


def document_spans(a: Bytes, paragraphs: bool, has_cr: bool) -> tuple[Int64s, Int64s]:
    """``(starts, stops)`` of the documents of ``a``: non-blank lines, or runs of them."""
    starts, stops = line_table(a, has_cr)
    keep = nonblank_lines(a, starts, stops)
    if not paragraphs:
        return starts[keep], stops[keep]
    # A paragraph runs from the start of its first non-blank line to the end of its last one.
    edge = np.diff(keep.astype(np.int8), prepend=np.int8(0), append=np.int8(0))
    first = np.flatnonzero(edge == 1)
    last = np.flatnonzero(edge == -1) - 1
    return starts[first], stops[last]


def fast_documents(
    buf: bytes | bytearray,
    end: int,
    paragraphs: bool,
    limit: int,
    *,
    keep_cr: bool = False,
    spans: tuple[Int64s, Int64s] | None = None,
) -> pa.Array | None:
    """The documents of ``buf[:end]`` (whole documents) as ``large_string``, or None for the exact path.

    See the module docstring for the fallback conditions. The result owns its bytes (``take``
    copies them), and every view of ``buf`` is gone on return, so the caller may resize it.
    ``spans``: ``document_spans`` of ``buf[:end]`` when the caller has them already.
    """
    has_cr = buf.find(b"\r", 0, end) >= 0
    a = np.frombuffer(buf, dtype=np.uint8, count=end)
    starts, stops = document_spans(a, paragraphs, has_cr) if spans is None else spans
    n = len(starts)
    if n == 0:
        return pa.array([], type=pa.large_string())
    if int((stops - starts).max()) > limit:
        return None
    # Documents and the gaps between them alternate in one array over ``buf``; keep the documents.
    offsets = np.empty(2 * n + 1, dtype=np.int64)
    offsets[0] = 0
    offsets[1::2] = starts
    offsets[2::2] = stops
    both = pa.LargeStringArray.from_buffers(2 * n, pa.py_buffer(offsets), pa.py_buffer(a))
    docs = both.take(pa.array(np.arange(1, 2 * n, 2, dtype=np.int64)))
    del both, a
    try:
        docs.validate(full=True)  # the UTF-8 of every value, in C
    except pa.ArrowInvalid:
        return None
    if paragraphs and has_cr and not keep_cr:
        # The order of normalize_line_ends: CRLF first, then a lone CR.
        docs = pc.replace_substring(pc.replace_substring(docs, "\r\n", "\n"), "\r", "\n")
    out: pa.Array = docs
    return out


_CUT_WINDOW: Final = 1 << 16


def last_paragraph_cut(buf: bytes | bytearray, frm: int) -> int:
    """End of the last paragraph separator starting at or after ``frm`` (0: there is none).

    A separator is a line end followed by blank lines, each ending in a line end, matched
    greedily and without overlap from ``frm`` on; so the last one ends just after the line end
    of the last blank line that follows a line end at or after ``frm``. (A match never starts
    at the LF of a CRLF: the attempt at its CR would have matched the same bytes.) That line is
    looked for in a window at the end of ``buf``, grown fourfold while it holds none, so a
    typical call reads a few kilobytes. The tests compare this with the separator regex.
    """
    size = _CUT_WINDOW
    while True:
        lo = max(frm, len(buf) - size)
        has_cr = buf.find(b"\r", lo) >= 0
        a = np.frombuffer(buf, dtype=np.uint8, offset=lo)
        starts, stops = line_table(a, has_cr)
        # Line 0 has no line end before it in the window; the last line has none after it.
        blank = ~nonblank_lines(a, starts[1:-1], stops[1:-1])
        del a  # release the export of ``buf`` before the caller resizes it
        hits = np.flatnonzero(blank)
        if len(hits):
            return lo + int(starts[int(hits[-1]) + 2])
        if lo == frm:
            return 0
        size *= 4
