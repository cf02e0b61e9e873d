"""One table of a batch's words for every word-based quality measure.

Words are the whitespace-separated runs of ``utf8_split_whitespace`` (the same cut as
:func:`seqpipe.clean._quality.words`), found as start and end positions in the batch's UTF-8
bytes, so no string per word is built. Each word gets a 64-bit key: a word of at most seven
bytes is its bytes with its length above them (an injective packing, not a hash), so equal
keys there mean equal words; a longer word's key is a hash of its length and its first and
last eight bytes with the top byte 0xFF (equal for equal words, and never a short word's
key, but two longer words may share one). Its exact code (:meth:`WordTable.exact`) numbers
the longer words by Arrow's hash table over their bytes, and is only made for the words that
need it (the few n-grams whose keys repeat, the few words judged by their text). Mean word
length, repeated n-grams and function words all read this one table.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe.clean._quality import (
    SPACE_RUNS,
    Wide,
    in_runs,
    mark_wide_spaces,
    mix64,
    padded_bytes,
    reduce_runs,
    scratch,
    utf8_buffers,
    wide_code_points,
)
from seqpipe.clean.base import as_documents

_PACKED: Final = 7  # bytes a code holds; the top byte holds the length (1-7), so no two packings meet
_LONG: Final = np.uint64(0xFF << 56)  # top byte of a longer word's key and exact code
_HASH_BITS: Final = np.uint64((1 << 56) - 1)  # a longer word's key: its hash below the top byte
_LAST_MIX: Final = np.uint64(0x9E3779B97F4A7C15)  # odd: spreads the last eight bytes before mixing
_SUM32_ITEMS: Final = 1 << 24  # one-byte values below which per-document sums fit in 32 bits
# per length 0-7: the mask of that many low bytes
LOW_BYTES: Final = np.array([(1 << (8 * k)) - 1 for k in range(_PACKED + 1)], dtype=np.uint64)
# per length 0-7: that length in the top byte
_LENGTH_BYTE: Final = np.array([k << 56 for k in range(_PACKED + 1)], dtype=np.uint64)


@dataclass(frozen=True, slots=True)
class WordTable:
    """A batch's words in order: ``doc[i]`` holds word ``i``, which spans bytes
    ``starts[i]:ends[i]`` of ``data``; ``first[d]:first[d + 1]`` are document ``d``'s words."""

    data: np.ndarray  # uint8, the batch's UTF-8 bytes
    starts: np.ndarray  # int64
    ends: np.ndarray  # int64
    doc: np.ndarray  # int64, non-decreasing
    first: np.ndarray  # int64, documents + 1 word offsets
    keys: np.ndarray  # uint64, equal for equal words; exact for words of at most seven bytes
    chars: np.ndarray  # int64, code points per word
    wide: Wide  # the batch's code points beyond ASCII
    wide_word: np.ndarray  # int64, per code point of ``wide``: the word holding it, or -1 (whitespace)
    exact_codes: np.ndarray | None = None  # filled by the ``codes`` property when first asked
    char_sums: np.ndarray | None = None  # filled by ``chars_per_document`` when first asked

    @property
    def documents(self) -> int:
        """Documents of the batch (with or without words)."""
        return len(self.first) - 1

    def per_document(self, values: np.ndarray) -> np.ndarray:
        """Sum of ``values`` (one per word, integers) for each document, as int64."""
        out = np.zeros(self.documents, dtype=np.int64)
        filled = self.first[1:] > self.first[:-1]
        if filled.any():
            # one-byte values (flags) summed in 32 bits where no sum can pass 2**32: a cast of
            # half the size of one to int64
            small = values.dtype.itemsize == 1 and len(values) < _SUM32_ITEMS
            out[filled] = reduce_runs(values, self.first[:-1][filled], np.uint32 if small else np.int64)
        return out

    @property
    def chars_per_document(self) -> np.ndarray:
        """Code points in words per document (int64); made once and kept (two measures read it)."""
        if self.char_sums is None:
            object.__setattr__(self, "char_sums", self.per_document(self.chars))
        assert self.char_sums is not None
        return self.char_sums

    def count(self) -> np.ndarray:
        """Words per document."""
        return np.diff(self.first)

    @property
    def codes(self) -> np.ndarray:
        """Per word: its exact code (uint64, equal exactly for equal words); made once and kept."""
        if self.exact_codes is None:
            object.__setattr__(self, "exact_codes", self.exact(np.arange(len(self.keys), dtype=np.int64)))
        assert self.exact_codes is not None
        return self.exact_codes

    def exact(self, which: np.ndarray) -> np.ndarray:
        """Per word of ``which`` (indices): a code equal for two of them exactly when their bytes
        are equal (its key for a word of at most seven bytes, else ``_LONG`` and its number
        among the distinct longer words of ``which``)."""
        out: np.ndarray = self.keys[which]
        long = np.flatnonzero(out >= _LONG)
        if len(long):
            chosen = which[long]
            encoded = pc.dictionary_encode(spans(self.data, self.starts[chosen], self.ends[chosen]))
            out[long] = _LONG | np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.uint64)
        return out

    def holding_wide(self, kernel: Callable[[pa.Array], pa.Array]) -> np.ndarray:
        """Per word: whether it holds a code point beyond ASCII for which ``kernel`` (a pyarrow
        predicate over one-character strings, asked once per distinct code point) is True."""
        out = np.zeros(len(self.keys), dtype=bool)
        if len(self.wide.at):
            word = self.wide_word[self.wide.classify(kernel) & (self.wide_word >= 0)]
            out[word] = True
        return out

    def distinct(self, which: np.ndarray | None = None) -> tuple[pa.Array, np.ndarray]:
        """The distinct words (``large_string``) among the words ``which`` (indices; all words
        when None) and, per such word, its index among them."""
        chosen = np.arange(len(self.keys), dtype=np.int64) if which is None else which
        encoded = pc.dictionary_encode(pa.array(self.exact(chosen), pa.uint64()))
        index = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64)
        first_seen = np.empty(len(encoded.dictionary), dtype=np.int64)
        first_seen[index[::-1]] = chosen[::-1]  # the first word of each
        return spans(self.data, self.starts[first_seen], self.ends[first_seen]), index


def pack_ascii(words: list[str]) -> np.ndarray:
    """The codes :class:`WordTable` gives the ASCII words ``words`` of one to seven bytes."""
    return np.array(
        [int.from_bytes(w.encode("ascii"), "little") | (len(w) << 56) for w in words if 1 <= len(w) <= _PACKED],
        dtype=np.uint64,
    )


def spans(data: np.ndarray, starts: np.ndarray, ends: np.ndarray) -> pa.Array:
    """A ``large_string`` array of the byte ranges ``data[starts[i]:ends[i]]`` (whole code points)."""
    sizes = ends - starts
    bounds = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=bounds[1:])
    at = np.repeat(starts - bounds[:-1], sizes) + np.arange(int(bounds[-1]), dtype=np.int64)
    text = np.take(data, at) if len(at) else np.zeros(0, np.uint8)
    return pa.LargeStringArray.from_buffers(len(sizes), pa.py_buffer(bounds), pa.py_buffer(text))


class _LastTable(threading.local):
    """Per thread, the last batch's table (the filters of a batch measure the same documents)."""

    def __init__(self) -> None:
        self.docs: pa.Array | None = None
        self.table: WordTable | None = None


_LAST_TABLE: Final = _LastTable()


def word_table(docs: pa.Array) -> WordTable:
    """The :class:`WordTable` of ``docs`` (kept for the next call on the same array)."""
    docs = as_documents(docs)
    last = _LAST_TABLE
    if last.table is not None and docs is last.docs:
        return last.table
    table = _cut(docs)
    last.docs, last.table = docs, table
    return table


def _bounds(docs: pa.Array, data: np.ndarray, offsets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end byte of every word: a word starts at a non-space byte after a space byte or
    at a document's start, and ends before a space byte or at a document's end."""
    # both byte-sized arrays in this thread's scratch buffers (see _quality.scratch)
    inside = mark_wide_spaces(docs, in_runs(data, SPACE_RUNS, out=scratch("bytes.1", len(data), np.bool_)))
    np.logical_not(inside, out=inside)
    edge = scratch("bytes.2", len(data), np.bool_)  # True > False: inside here, not inside before / after
    edge[0] = inside[0]
    np.greater(inside[1:], inside[:-1], out=edge[1:])
    first = offsets[:-1][offsets[:-1] < len(data)]
    edge[first] = inside[first]  # no word spans two documents
    starts = np.flatnonzero(edge)
    edge[-1] = inside[-1]
    np.greater(inside[:-1], inside[1:], out=edge[:-1])
    last = offsets[1:][offsets[1:] > offsets[:-1]] - 1
    edge[last] = inside[last]
    ends = np.flatnonzero(edge)
    ends += 1  # in place: no second array of a position per word
    return starts, ends


def _keys(data: np.ndarray, starts: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Per word: its 64-bit key (see the module docstring)."""
    padded = padded_bytes(data, "padded")  # eight zero bytes after the batch's
    # every byte position read as the start of a little-endian uint64 (overlapping, no copy)
    eight = np.ndarray((len(data),), dtype="<u8", buffer=padded, strides=(1,))
    # fancy indexing, not np.take: np.take copies a strided view whole first (DEVELOPERS.md)
    keys: np.ndarray = eight[starts]
    is_long = scratch("words.is_long", len(sizes), np.bool_)
    np.greater(sizes, _PACKED, out=is_long)
    long = np.flatnonzero(is_long)
    if len(long):
        # first and last eight bytes (whole: a longer word has at least eight) and the length
        size = sizes[long]
        at = starts[long]
        at += size
        at -= 8
        last = eight[at]
        with np.errstate(over="ignore"):
            last *= _LAST_MIX
            last += size.view(np.uint64)  # sizes are positive: the same bits
            mixed = mix64(keys[long] ^ mix64(last))
    # per word its low-byte mask and its length byte, from tables by length (mode="clip": a
    # longer word reads the entries of length 7, and its key is replaced below), through one
    # scratch array
    table = scratch("words.by_length", len(sizes), np.uint64)
    keys &= np.take(LOW_BYTES, sizes, mode="clip", out=table)
    keys |= np.take(_LENGTH_BYTE, sizes, mode="clip", out=table)
    if len(long):
        mixed &= _HASH_BITS
        mixed |= _LONG
        keys[long] = mixed
    return keys


def _chars(wide: Wide, starts: np.ndarray, ends: np.ndarray, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per word: its code points, that is its bytes (``sizes``, turned into the code points in
    place) less those after the first of each code point beyond ASCII (few in most text); per
    such code point, the word holding it or -1."""
    chars = sizes
    word = np.full(len(wide.at), -1, dtype=np.int64)
    if len(wide.at) and len(starts):
        word = np.searchsorted(starts, wide.at, side="right") - 1
        inside = (word >= 0) & (wide.at < ends[np.maximum(word, 0)])  # not a wide whitespace character
        word[~inside] = -1
        held, extra = word[inside], wide.size[inside] - 1  # held is non-decreasing (wide.at is)
        if len(held):
            run = np.flatnonzero(np.diff(held, prepend=-1) != 0)  # the first code point of each word holding some
            chars[held[run]] -= np.add.reduceat(extra, run)
    return chars, word


def _cut(docs: pa.Array) -> WordTable:
    data, offsets = utf8_buffers(docs)
    wide = wide_code_points(docs)
    if not len(data):
        none = np.zeros(0, np.int64)
        first = np.zeros(len(docs) + 1, np.int64)
        return WordTable(data, none, none, none, first, np.zeros(0, np.uint64), none, wide, none)
    starts, ends = _bounds(docs, data, offsets)
    first = np.searchsorted(starts, offsets).astype(np.int64)
    doc = np.repeat(np.arange(len(docs), dtype=np.int64), np.diff(first))
    sizes = ends - starts
    keys = _keys(data, starts, sizes)
    chars, wide_word = _chars(wide, starts, ends, sizes)  # sizes become the code points
    return WordTable(data, starts, ends, doc, first, keys, chars, wide, wide_word)
