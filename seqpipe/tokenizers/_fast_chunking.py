"""The ``trailing-space`` chunkings (``_chunking``) computed with array operations over a batch.

Chunking a batch with ``regex.findall`` document by document was the largest cost of segmenting
for byte-pair encoding after training. The default presets' rule is local: whether a character
starts a chunk depends only on its class and on the characters before it in its document (the
previous character, the one before that, the start of the run of tail marks or digits it ends),
so every chunk start is found at once from per-character classes. Classes come from the same
``regex`` character classes as the presets, once per distinct code point, so both paths agree on
every character (tested against ``regex.findall`` with the preset itself).
"""

from __future__ import annotations

from typing import Final

import numpy as np
import pyarrow as pa
import regex

from seqpipe.tokenizers._chunking import BREAK_CLASS, SPACE_CLASS, TAIL_CLASS

# character kinds; NONE stands before the first character of a document
BREAK, SPACE, LETTER, MARK, NUMBER, TAIL, OTHER, NONE = range(8)
_KINDS: Final = (
    (BREAK, regex.compile(BREAK_CLASS)),
    (SPACE, regex.compile(SPACE_CLASS)),
    (LETTER, regex.compile(r"\p{L}")),
    (MARK, regex.compile(r"\p{M}")),
    (NUMBER, regex.compile(r"\p{N}")),
    (TAIL, regex.compile(TAIL_CLASS)),
)
_APOSTROPHES: Final = (ord("'"), 0x2019)  # kept inside a word between two letters


def _kind(cp: int) -> int:
    ch = chr(cp)
    for kind, pattern in _KINDS:
        if pattern.fullmatch(ch):
            return kind
    return OTHER


# The kind of every code point classified so far (-1: not yet); one byte per code point. Filling
# an entry twice (two threads) writes the same value.
_TABLE: Final = np.full(0x110000, -1, dtype=np.int8)


def _kinds(points: np.ndarray) -> np.ndarray:
    """The kind of each code point, by table; code points not seen before are classified once."""
    kinds: np.ndarray = _TABLE[points]
    new = kinds < 0
    if new.any():
        seen = np.zeros(int(points.max()) + 1, dtype=bool)
        seen[points[new]] = True  # distinct new code points without sorting them
        fresh = np.flatnonzero(seen)
        _TABLE[fresh] = [_kind(c) for c in fresh.tolist()]
        kinds = _TABLE[points]
    return kinds


def _code_points(data: np.ndarray, lead: np.ndarray) -> np.ndarray:
    """The code point of each character of valid UTF-8 ``data`` starting at byte ``lead``."""
    points: np.ndarray = data[lead].astype(np.int64)
    multi = np.flatnonzero(points >= 0xC0)
    if not len(multi):
        return points
    at = lead[multi]
    padded = np.concatenate([data, np.zeros(3, np.uint8)])
    # RFC 3629: the lead byte holds 5, 4 or 3 bits for 2-, 3- and 4-byte forms; each continuation byte 6
    lead_bits, c1, c2, c3 = (padded[at + k].astype(np.uint32) & m for k, m in enumerate((0xFF, 0x3F, 0x3F, 0x3F)))
    value = np.where(
        lead_bits < 0xE0,
        ((lead_bits & 0x1F) << 6) | c1,
        np.where(
            lead_bits < 0xF0,
            ((lead_bits & 0x0F) << 12) | (c1 << 6) | c2,
            ((lead_bits & 0x07) << 18) | (c1 << 12) | (c2 << 6) | c3,
        ),
    )
    points[multi] = value
    return points


def _anchor(mask: np.ndarray) -> np.ndarray:
    """For each index, the last index at or before it where ``mask`` holds (0 if none)."""
    at = np.where(mask, np.arange(len(mask)), 0)
    out: np.ndarray = np.maximum.accumulate(at) if len(at) else at
    return out


def _starts(kind: np.ndarray, first: np.ndarray, apostrophe: np.ndarray, digitwise: bool) -> np.ndarray:
    """Whether each character starts a chunk, by the preset's rule (see ``_chunking``)."""
    n = len(kind)
    # a mark is part of a word when the last non-mark before it (in its document) is a letter
    base = _anchor((kind != MARK) | first)
    word = (kind == LETTER) | ((kind == MARK) & (kind[base] == LETTER))
    k = np.where(word, LETTER, np.where(kind == MARK, OTHER, kind)).astype(np.int8)
    prev = np.full(n, NONE, dtype=np.int8)
    prev[1:] = k[:-1]
    prev[first] = NONE
    start = first.copy()
    start |= (k == BREAK) & (prev != BREAK)
    start |= (k == SPACE) & (prev == BREAK)
    # a letter goes on a word after a letter (or a mark in it), or after an apostrophe that follows one
    joined = np.zeros(n, dtype=bool)
    joined[2:] = apostrophe[1:-1] & (k[:-2] == LETTER) & ~first[1:-1]
    start |= (kind == LETTER) & (prev != LETTER) & ~joined
    start |= (k == TAIL) & ((prev == SPACE) | (prev == BREAK))
    # any other character ends a word's or number's tail, and goes on a run of other characters
    # (a run of tail marks that began after a space, a line break or another such character)
    tail_from = _anchor((k != TAIL) | first)
    run_head = np.full(n, NONE, dtype=np.int8)
    run_head[1:] = k[tail_from[:-1]]
    run_head[1:][first[tail_from[:-1]] & (k[tail_from[:-1]] == TAIL)] = OTHER
    after_tail = (prev == TAIL) & ((run_head == LETTER) | (run_head == NUMBER))
    start |= (k == OTHER) & ((prev == SPACE) | (prev == BREAK) | (prev == LETTER) | (prev == NUMBER) | after_tail)
    number = k == NUMBER
    if digitwise:
        start |= number
    else:  # digits in threes from the right of each run: a start where a multiple of three remain
        run_start = number & (prev != NUMBER)
        nxt = np.full(n, NONE, dtype=np.int8)
        nxt[:-1] = k[1:]
        nxt[:-1][first[1:]] = NONE
        run_end = np.flatnonzero(number & (nxt != NUMBER)) + 1
        begins = np.flatnonzero(run_start)
        ends = np.repeat(run_end, run_end - begins)
        at = np.flatnonzero(number)
        start[at[(ends - at) % 3 == 0]] = True
        start |= run_start
    return start


def chunk_batch(texts: pa.Array, *, digitwise: bool) -> tuple[pa.Array, np.ndarray] | None:
    """The chunks of every document of ``texts`` (a large_string array) as one large_string array
    (views of the batch's bytes) and each document's number of chunks; None where the batch
    holds nulls (the per-document path handles those)."""
    n_docs = len(texts)
    if texts.null_count:
        return None
    offsets = np.frombuffer(texts.buffers()[1], dtype=np.int64)[texts.offset : texts.offset + n_docs + 1]
    buf = texts.buffers()[2]
    if buf is None or n_docs == 0 or offsets[-1] == offsets[0]:
        return pa.array([], pa.large_string()), np.zeros(n_docs, np.int64)
    data = np.frombuffer(buf, dtype=np.uint8)[offsets[0] : offsets[-1]]
    doc_bytes = offsets - offsets[0]
    lead = np.flatnonzero((data & 0xC0) != 0x80)  # the first byte of each character
    points = _code_points(data, lead)
    first = np.zeros(len(lead), dtype=bool)
    nonempty = doc_bytes[1:] > doc_bytes[:-1]
    first[np.searchsorted(lead, doc_bytes[:-1][nonempty])] = True
    apostrophe = np.isin(points, _APOSTROPHES)
    start = _starts(_kinds(points), first, apostrophe, digitwise)
    edges = lead[start]
    per_doc = np.bincount(np.searchsorted(doc_bytes, edges, side="right") - 1, minlength=n_docs)
    bounds = np.append(edges, doc_bytes[-1]) + offsets[0]
    chunks = pa.LargeStringArray.from_buffers(len(edges), pa.py_buffer(bounds.astype(np.int64).tobytes()), buf)
    return chunks, per_doc[:n_docs].astype(np.int64)
