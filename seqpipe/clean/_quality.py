"""What the quality filters share: the filter base class and batch-wide word and line tables.

A quality filter keeps or drops whole documents by one measured property. Every measure is
computed for the whole batch at once with pyarrow compute and numpy: documents are split into
words (or lines) into one flat array with the index of the document each belongs to, and
per-document figures are sums (``np.bincount``) or maxima over that index. No Python call is
made per word.
"""

from __future__ import annotations

import itertools
import threading
from abc import abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import xxhash

from seqpipe.clean.base import CleanStep, as_documents

# splitmix64 finalizer constants (the same as seqpipe.splits; Steele, Lea and Flood 2014)
_MIX1: Final = np.uint64(0xBF58476D1CE4E5B9)
_MIX2: Final = np.uint64(0x94D049BB133111EB)


def mix64(x: np.ndarray) -> np.ndarray:
    """The splitmix64 finalizer applied to every uint64 of ``x`` (a bijection that spreads bits)."""
    with np.errstate(over="ignore"):
        x = x ^ (x >> np.uint64(30))
        x = x * _MIX1
        x = x ^ (x >> np.uint64(27))
        x = x * _MIX2
        out: np.ndarray = x ^ (x >> np.uint64(31))
        return out


def utf8_buffers(docs: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """The UTF-8 bytes of a ``large_string`` array (uint8) and each document's start and end in
    them (int64, ``len(docs) + 1`` offsets starting at 0); no copy of the text."""
    n = len(docs)
    offsets = np.frombuffer(docs.buffers()[1], dtype=np.int64)[docs.offset : docs.offset + n + 1]
    data = docs.buffers()[2]
    if data is None or n == 0 or offsets[-1] == offsets[0]:
        return np.zeros(0, np.uint8), np.zeros(n + 1, np.int64)
    raw = np.frombuffer(data, dtype=np.uint8)[offsets[0] : offsets[-1]]
    return raw, offsets - offsets[0]


def code_points(data: np.ndarray, lead: np.ndarray) -> np.ndarray:
    """The code point starting at each of the positions ``lead`` (first bytes >= 0xC0 of valid UTF-8)."""
    first = data[lead].astype(np.int64)
    size = np.where(first >= 0xF0, 4, np.where(first >= 0xE0, 3, 2))
    cp: np.ndarray = first & np.where(size == 4, 0x07, np.where(size == 3, 0x0F, 0x1F))
    for k in (1, 2, 3):  # continuation bytes, up to three
        more = size > k
        cont = data[np.minimum(lead + k, len(data) - 1)].astype(np.int64) & 0x3F
        cp = np.where(more, (cp << 6) | cont, cp)
    return cp


# per kernel: the code points asked so far (sorted) and its answers; replaced whole under the lock
_ANSWERS: Final[dict[Callable[[pa.Array], pa.Array], tuple[np.ndarray, np.ndarray]]] = {}
_ANSWERS_LOCK: Final = threading.Lock()
_ANSWERS_MAX: Final = 1 << 16  # code points kept per kernel; past that, new ones are asked each time


def _asked(distinct: np.ndarray, kernel: Callable[[pa.Array], pa.Array]) -> np.ndarray:
    """Per code point of ``distinct`` (distinct, in any order): ``kernel``'s answer (a pyarrow predicate
    over one-character strings), so the answer is the library's own for every character. Answers
    are kept per kernel, so each code point is asked once in a process, not once per batch."""
    known, answers = _ANSWERS.get(kernel, (np.zeros(0, np.int64), np.zeros(0, bool)))
    at = np.minimum(np.searchsorted(known, distinct), max(len(known) - 1, 0))
    found = known[at] == distinct if len(known) else np.zeros(len(distinct), dtype=bool)
    out = np.zeros(len(distinct), dtype=bool)
    out[found] = answers[at[found]]
    new = distinct[~found]
    if len(new):
        chars = pa.array([chr(c) for c in new.tolist()], pa.large_string())
        out[~found] = got = np.asarray(kernel(chars).to_numpy(zero_copy_only=False), dtype=bool)
        with _ANSWERS_LOCK:
            known, answers = _ANSWERS.get(kernel, (np.zeros(0, np.int64), np.zeros(0, bool)))
            if len(known) + len(new) <= _ANSWERS_MAX:
                merged, first = np.unique(np.concatenate([known, new]), return_index=True)
                _ANSWERS[kernel] = (merged, np.concatenate([answers, got])[first])
    return out


class _Scratch(threading.local):
    """Per thread, the scratch arrays of the batch-wide passes, by slot name (see :func:`scratch`)."""

    def __init__(self) -> None:
        self.buffers: dict[str, np.ndarray] = {}
        self.kept = 0  # bytes of all buffers


_SCRATCH: Final = _Scratch()
_SCRATCH_MAX: Final = 64 << 20  # bytes kept per thread; an array past that is made new each time


def scratch(slot: str, size: int, dtype: type | np.dtype[Any]) -> np.ndarray:
    """An array of ``size`` items of ``dtype`` with undefined content, over this thread's buffer
    ``slot``: the same memory on every call with that slot, so the next call with it overwrites
    the array. Only for temporaries that no result keeps; two functions share a slot only when
    neither runs while the other holds it.

    A new array of a batch's size is faulted in and zeroed by the kernel page by page whenever
    malloc handed the last one back (a caller's process may do so for every large array: with
    glibc's trim threshold at 64 KiB the word cut took twice the CPU time); a kept buffer is
    not. The buffers of a thread hold at most ``_SCRATCH_MAX`` bytes together (24 MB measured for
    the batches of about 1 MB a build reads, with every quality filter and redact).
    """
    kind = np.dtype(dtype)
    nbytes = size * kind.itemsize
    state = _SCRATCH
    buffer = state.buffers.get(slot)
    if buffer is None or len(buffer) < nbytes:
        grown = nbytes + nbytes // 8 + 64  # an eighth more: the next batch is seldom exactly as large
        held = 0 if buffer is None else len(buffer)
        if state.kept - held + grown > _SCRATCH_MAX:
            return np.empty(size, dtype=kind)
        buffer = state.buffers[slot] = np.empty(grown, dtype=np.uint8)
        state.kept += grown - held
    out: np.ndarray = buffer[:nbytes].view(kind)
    return out


def padded_bytes(data: np.ndarray, slot: str) -> np.ndarray:
    """``data`` (uint8) followed by eight zero bytes, in this thread's scratch buffer ``slot``."""
    padded = scratch(slot, len(data) + 8, np.uint8)
    padded[: len(data)] = data
    padded[len(data) :] = 0
    return padded


@dataclass(frozen=True, slots=True)
class Wide:
    """A batch's code points beyond ASCII: the position of each one's first byte, its size in
    bytes, and the distinct code points (in no set order) with, per position, its index among them."""

    at: np.ndarray
    size: np.ndarray
    distinct: np.ndarray
    inverse: np.ndarray

    def classify(self, kernel: Callable[[pa.Array], pa.Array]) -> np.ndarray:
        """Per position: ``kernel``'s answer for its code point (asked once per distinct one)."""
        out: np.ndarray = _asked(self.distinct, kernel)[self.inverse]
        return out


class _LastWide(threading.local):
    """Per thread, the last batch's :class:`Wide` (the filters of a batch measure the same documents)."""

    def __init__(self) -> None:
        self.docs: pa.Array | None = None
        self.wide: Wide | None = None


_LAST_WIDE: Final = _LastWide()


# per sequence size (2-4 bytes): the mask of its bytes in a little-endian uint32
_SEQUENCE_MASK: Final = np.array([0, 0, 0xFFFF, 0xFFFFFF, 0xFFFFFFFF], dtype=np.uint32)


def wide_code_points(docs: pa.Array) -> Wide:
    """The :class:`Wide` of a ``large_string`` array's bytes (kept for the next call on the same array)."""
    last = _LAST_WIDE
    if last.wide is not None and docs is last.docs:
        return last.wide
    data = utf8_buffers(docs)[0]
    lead = scratch("wide.lead", len(data), np.bool_)
    np.greater_equal(data, np.uint8(0xC0), out=lead)
    at = np.flatnonzero(lead)
    first = np.take(data, at)
    size = np.where(first >= 0xF0, 4, np.where(first >= 0xE0, 3, 2))
    # each code point's bytes read as one little-endian uint32 (equal exactly for equal code
    # points), numbered by Arrow's hash table: a batch holds few distinct code points among
    # many positions (no sort); only the distinct ones are decoded
    padded = padded_bytes(data, "padded")
    four = np.ndarray((len(data),), dtype="<u4", buffer=padded, strides=(1,))
    raw = four[at] & np.take(_SEQUENCE_MASK, size)  # fancy indexing on a strided view (DEVELOPERS.md)
    encoded = pc.dictionary_encode(pa.array(raw, pa.uint32()))
    distinct = np.ascontiguousarray(encoded.dictionary.to_numpy(zero_copy_only=False), dtype="<u4")
    points = code_points(distinct.view(np.uint8), np.arange(len(distinct), dtype=np.int64) * 4)
    wide = Wide(at, size, points, np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64))
    last.docs, last.wide = docs, wide
    return wide


# per byte value below 0x80: whitespace as pyarrow's utf8_split_whitespace (and so words()) sees it
_ASCII_SPACE: Final = np.zeros(256, dtype=bool)
_ASCII_SPACE[:128] = np.asarray(
    pc.utf8_is_space(pa.array([chr(b) for b in range(128)], pa.large_string())).to_numpy(zero_copy_only=False),
    dtype=bool,
)


def byte_runs(flags: np.ndarray) -> tuple[tuple[int, int], ...]:
    """The runs (first, last) of the byte values whose flag is set."""
    edges = np.flatnonzero(np.diff(np.r_[0, np.asarray(flags, dtype=np.int8), 0]))
    return tuple(zip(edges[0::2].tolist(), (edges[1::2] - 1).tolist(), strict=True))


def in_runs(data: np.ndarray, runs: tuple[tuple[int, int], ...], out: np.ndarray | None = None) -> np.ndarray:
    """Per byte of ``data`` (uint8): whether its value lies in one of ``runs`` ((first, last)
    pairs), in ``out`` when given (bool, ``data``'s length) or a new array. One subtraction and
    compare per run (``byte - first`` wraps below ``first``): a few times cheaper than a table
    look-up per byte, which numpy makes with an index array of eight bytes per byte."""
    if out is None:
        out = np.empty(len(data), dtype=bool)
    if not runs:
        out[:] = False
    # two scratch arrays for all runs (see scratch); the first run's compare writes ``out``
    shifted = scratch("in_runs.shifted", len(data), np.uint8)
    inside = scratch("in_runs.inside", len(data), np.bool_) if len(runs) > 1 else out
    for k, (first, last) in enumerate(runs):
        np.subtract(data, np.uint8(first), out=shifted, dtype=np.uint8)
        np.less_equal(shifted, np.uint8(last - first), out=inside if k else out)
        if k:
            out |= inside
    return out


# Byte values by class, as runs: SPACE_RUNS, whitespace below U+0080 as _ASCII_SPACE (bytes 9-13
# and 28-32); RE2_SPACE_RUNS, RE2's \\s (only tab, line feed, form feed, carriage return and
# space; RE2 syntax reference, "Perl classes").
SPACE_RUNS: Final = byte_runs(_ASCII_SPACE)
RE2_SPACE_RUNS: Final = byte_runs(np.isin(np.arange(256), [9, 10, 12, 13, 32]))


def space_bytes(docs: pa.Array) -> np.ndarray:
    """Per byte of a ``large_string`` array's UTF-8 bytes: whether it belongs to a whitespace
    code point as pyarrow's ``utf8_is_space`` (and so ``utf8_split_whitespace``) sees it, asked
    once per distinct non-ASCII code point."""
    return mark_wide_spaces(docs, in_runs(utf8_buffers(docs)[0], SPACE_RUNS))


def mark_wide_spaces(docs: pa.Array, space: np.ndarray) -> np.ndarray:
    """``space`` (one flag per UTF-8 byte of ``docs``) with every byte of each multi-byte code
    point set to whether ``utf8_is_space`` holds for it (asked once per distinct code point)."""
    wide = wide_code_points(docs)
    if len(wide.at):
        flag = wide.classify(pc.utf8_is_space)
        for k in range(4):
            at = wide.size > k
            space[wide.at[at] + k] = flag[at]
    return space


_SUM32_BYTES: Final = 1 << 24  # bytes below which per_document_sum adds in 32 bits


def per_document_sum(flags: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Per document: the sum of ``flags`` (one small whole number per byte, uint8 or bool) within
    its byte range."""
    out = np.zeros(len(offsets) - 1, dtype=np.int64)
    filled = offsets[1:] > offsets[:-1]
    if filled.any():
        # 32-bit sums where no sum can pass 2**32 (255 per byte): half the memory traffic of
        # 64-bit. Widened into a scratch array first, and summed into a given output: reduceat's
        # own cast (its dtype argument) makes a new array of the flags' length, and without
        # ``out`` it made one too (page faults measured with getrusage)
        out[filled] = reduce_runs(flags, offsets[:-1][filled], np.uint32 if len(flags) < _SUM32_BYTES else np.int64)
    return out


def reduce_runs(values: np.ndarray, starts: np.ndarray, dtype: type) -> np.ndarray:
    """``np.add.reduceat(values, starts, dtype=dtype)`` (``starts`` increasing, in range) without a
    new array of ``values``' length: a cast goes through this thread's scratch buffer."""
    if values.dtype != np.dtype(dtype):
        widened = scratch("reduce_runs", len(values), dtype)
        np.copyto(widened, values, casting="unsafe")
        values = widened
    out: np.ndarray = np.zeros(len(starts), dtype=dtype)
    if len(starts):
        np.add.reduceat(values, starts, out=out)
    return out


@dataclass(frozen=True, slots=True)
class QualityFilter(CleanStep):
    """A step that drops the documents failing one measure; the build counts them per step."""

    is_quality_filter: ClassVar[bool] = True

    @abstractmethod
    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""

    def apply(self, docs: pa.Array) -> pa.Array:
        """The documents that pass, in order."""
        docs = as_documents(docs)
        out: pa.Array = docs.filter(pa.array(self.keep(docs)))
        return out


@dataclass(frozen=True, slots=True)
class Pieces:
    """A batch cut into non-empty pieces (words or lines): ``text[i]`` belongs to document ``doc[i]``."""

    text: pa.Array  # large_string
    doc: np.ndarray  # int64, non-decreasing
    documents: int
    # filled by encoded() the first time it is asked: the distinct pieces and each piece's index
    distinct: pa.Array | None = None
    codes: np.ndarray | None = None
    sizes: np.ndarray | None = None  # filled by lengths() (or by the cut) when first asked

    def per_document(self, values: np.ndarray) -> np.ndarray:
        """Sum of ``values`` (one per piece, whole numbers: each sum is exact) for each document,
        as float64: one reduction per run of a document's pieces (they are contiguous)."""
        out = np.zeros(self.documents, dtype=np.float64)
        if len(self.doc):
            starts = np.searchsorted(self.doc, np.arange(self.documents + 1, dtype=np.int64))
            filled = starts[1:] > starts[:-1]
            out[filled] = np.add.reduceat(np.asarray(values, dtype=np.float64), starts[:-1][filled])
        return out

    def count(self) -> np.ndarray:
        """Pieces per document."""
        return np.bincount(self.doc, minlength=self.documents).astype(np.int64)

    def lengths(self) -> np.ndarray:
        """Code points of each piece; computed once and kept."""
        if self.sizes is None:
            sizes = np.asarray(pc.utf8_length(self.text).to_numpy(zero_copy_only=False), dtype=np.int64)
            object.__setattr__(self, "sizes", sizes)
            return sizes
        return self.sizes

    def encoded(self) -> tuple[pa.Array, np.ndarray]:
        """The distinct pieces (some may no longer occur after :meth:`subset`) and, per piece, its
        index among them; computed once and kept."""
        if self.distinct is None or self.codes is None:
            encoded = pc.dictionary_encode(self.text)
            codes = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64)
            object.__setattr__(self, "distinct", encoded.dictionary)
            object.__setattr__(self, "codes", codes)
            return encoded.dictionary, codes
        return self.distinct, self.codes

    def subset(self, keep: np.ndarray) -> Pieces:
        """The pieces of the documents where ``keep`` is True, numbered among those documents."""
        inside = keep[self.doc]
        renumber = np.cumsum(keep) - 1
        return Pieces(
            self.text.filter(pa.array(inside)),
            renumber[self.doc[inside]],
            int(keep.sum()),
            self.distinct,
            None if self.codes is None else self.codes[inside],
            None if self.sizes is None else self.sizes[inside],
        )


class _LastWords(threading.local):
    """Per thread, the last batch cut into words: the filters of one batch run one after the
    other on the same documents, or on what the previous filter kept of them."""

    def __init__(self) -> None:
        self.docs: pa.Array | None = None
        self.digests: list[bytes] | None = None
        self.pieces: Pieces | None = None


_LAST_WORDS: Final = _LastWords()


def _digests(docs: pa.Array) -> list[bytes]:
    """XXH3-128 of each document's UTF-8 bytes (one C call per document)."""
    data, offsets = utf8_buffers(docs)
    view = data.data  # a memoryview of the bytes, no copy
    digest = xxhash.xxh3_128_digest
    bounds = offsets.tolist()
    return [digest(view[a:b]) for a, b in itertools.pairwise(bounds)]


def _kept_from(before: list[bytes], after: list[bytes]) -> np.ndarray | None:
    """``keep`` such that the documents ``after`` are those of ``before`` where ``keep`` is True,
    in order (by content digest); None when they are not. The k-th copy of a document in
    ``after`` is taken as the k-th in ``before`` (a filter keeps or drops all copies alike)."""
    if len(after) > len(before):
        return None
    seen: dict[bytes, int] = {}
    where: dict[tuple[bytes, int], int] = {}
    for i, d in enumerate(before):
        k = seen.get(d, 0)
        seen[d] = k + 1
        where[d, k] = i
    seen.clear()
    at = np.empty(len(after), dtype=np.int64)
    for j, d in enumerate(after):
        k = seen.get(d, 0)
        seen[d] = k + 1
        at[j] = where.get((d, k), -1)
    if len(at) and (at[0] < 0 or (np.diff(at) <= 0).any()):
        return None
    keep = np.zeros(len(before), dtype=bool)
    keep[at] = True
    return keep


def _pieces(docs: pa.Array, split: pa.Array) -> Pieces:
    lengths = np.asarray(pc.list_value_length(split).to_numpy(zero_copy_only=False), dtype=np.int64)
    flat = split.flatten().cast(pa.large_string())
    doc = np.repeat(np.arange(len(docs), dtype=np.int64), lengths)
    nonempty = np.asarray(pc.greater(pc.binary_length(flat), 0).to_numpy(zero_copy_only=False), dtype=bool)
    if not nonempty.all():
        flat, doc = flat.filter(pa.array(nonempty)), doc[nonempty]
    return Pieces(flat, doc, len(docs))


def words(docs: pa.Array) -> Pieces:
    """Whitespace-separated words of every document (Unicode whitespace).

    The last batch's words are kept per thread: called again with the same documents, or with
    some of them dropped (a filter in between), it reuses them instead of cutting the text again.
    """
    docs = as_documents(docs)
    last = _LAST_WORDS
    if last.pieces is not None and docs is last.docs:
        return last.pieces
    pieces = None
    if last.pieces is not None and last.docs is not None and _may_be_kept_from(last.docs, docs):
        if last.digests is None:
            last.digests = _digests(last.docs)
        digests = _digests(docs)
        keep = _kept_from(last.digests, digests)
        if keep is not None:
            pieces = last.pieces.subset(keep)
            last.docs, last.digests, last.pieces = docs, digests, pieces
            return pieces
    pieces = _split_words(docs)
    last.docs, last.digests, last.pieces = docs, None, pieces  # digests taken when first needed
    return pieces


def _may_be_kept_from(before: pa.Array, after: pa.Array) -> bool:
    """False when ``after`` surely is not some of the documents ``before`` (a check in C, so a
    new batch costs no digest per document): it is longer, or its first or last document is not among them."""
    if len(after) > len(before):
        return False
    if len(after) == 0:
        return True
    ends = pc.is_in(after.take(pa.array([0, len(after) - 1])), value_set=before)  # its first and last
    return bool(pc.all(ends).as_py())


def _split_words(docs: pa.Array) -> Pieces:
    """The words of ``docs`` as ``utf8_split_whitespace`` cuts them, found over the UTF-8 bytes
    with numpy: whitespace bytes are squeezed out and each word starts where a non-whitespace
    byte follows whitespace or a document's start, so Arrow gets the squeezed buffer and the
    word offsets (no string per word is built)."""
    data, offsets = utf8_buffers(docs)
    if not len(data):
        return Pieces(pa.array([], pa.large_string()), np.zeros(0, np.int64), len(docs), sizes=np.zeros(0, np.int64))
    space = space_bytes(docs)
    keep = ~space
    starts = keep.copy()
    starts[1:] &= space[:-1]
    first = offsets[:-1][offsets[:-1] < len(data)]  # first bytes of the documents (a word never spans two)
    starts[first] = keep[first]
    # np.compress, not boolean indexing: faster on byte arrays (DEVELOPERS.md)
    squeezed = np.compress(keep, data)
    bounds = np.append(np.flatnonzero(np.compress(keep, starts)), len(squeezed)).astype(np.int64)
    text = pa.LargeStringArray.from_buffers(len(bounds) - 1, pa.py_buffer(bounds), pa.py_buffer(squeezed))
    doc = np.repeat(np.arange(len(docs), dtype=np.int64), per_document_sum(starts, offsets))
    # code points per word: its bytes less its continuation bytes (few in most text)
    sizes = np.diff(bounds)
    continuation = np.flatnonzero((squeezed & 0xC0) == 0x80)
    if len(continuation):
        sizes -= np.bincount(np.searchsorted(bounds, continuation, side="right") - 1, minlength=len(sizes))
    return Pieces(text, doc, len(docs), sizes=sizes)


class _LastLines(threading.local):
    """Per thread, the last batch cut into lines (two filters measure lines of the same documents)."""

    def __init__(self) -> None:
        self.docs: pa.Array | None = None
        self.pieces: Pieces | None = None


_LAST_LINES: Final = _LastLines()


def lines(docs: pa.Array) -> Pieces:
    """Non-empty lines of every document (split at ``\\n``; a trailing ``\\r`` stays in its line)."""
    docs = as_documents(docs)
    last = _LAST_LINES
    if last.pieces is None or docs is not last.docs:
        last.docs, last.pieces = docs, _pieces(docs, pc.split_pattern(docs, "\n"))
    return last.pieces


def share(part: np.ndarray, whole: np.ndarray) -> np.ndarray:
    """``part / whole`` per document, 0 where ``whole`` is 0."""
    out = np.zeros(len(whole), dtype=np.float64)
    np.divide(part, whole, out=out, where=whole > 0)
    return out


def repeated(pieces: Pieces) -> np.ndarray:
    """Per piece: True when an equal piece came earlier in the same document."""
    if len(pieces.text) == 0:
        return np.zeros(0, dtype=bool)
    distinct, codes = pieces.encoded()
    # one int64 key per (document, piece): exact, since documents * distinct pieces < 2**63
    keys = pieces.doc * np.int64(len(distinct)) + codes
    _, first = np.unique(keys, return_index=True)
    seen_before = np.ones(len(codes), dtype=bool)
    seen_before[first] = False
    return seen_before
