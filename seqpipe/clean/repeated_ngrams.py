"""``kind = "repeated_ngrams"``: drop documents where much of the text sits in repeated word n-grams."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float, parse_int
from seqpipe.clean._quality import QualityFilter, scratch, share
from seqpipe.clean._word_table import word_table

_MULTIPLIER: Final = np.uint64(0x9E3779B97F4A7C15)  # odd, with bits spread over the whole word


def covered_by_repeats(
    doc: np.ndarray, keys: np.ndarray, n: int, exact: Callable[[np.ndarray], np.ndarray] | None = None
) -> np.ndarray:
    """Per word (document ``doc[i]``, key ``keys[i]``, equal for equal words): True when it lies
    inside a word n-gram that occurs more than once in its document. ``exact(indices)`` gives
    those words' exact codes (equal exactly for equal words); without it the keys are exact."""
    m = len(keys)
    covered = np.zeros(m, dtype=bool)
    if m < n:
        return covered
    keys = np.ascontiguousarray(keys).view(np.int64)  # the same bits: equal exactly when the keys are
    # the n-grams all of whose words may occur twice in their document (every word of an n-gram
    # seen twice in a document does) and that lie in one document (docs are contiguous)
    starts = _windows_of_repeated_words(doc, keys, n)
    starts = starts[doc[starts] == doc[starts + n - 1]]
    candidates = starts[_shared_keys(_window_keys_at(doc, keys, starts, n))]
    codes = keys
    if exact is not None and len(candidates):
        words = np.unique((candidates[:, None] + np.arange(n)).ravel())  # the candidates' words
        codes = np.zeros(m, dtype=np.int64)  # rows read only the candidates' words
        codes[words] = np.ascontiguousarray(exact(words)).view(np.int64)
    repeated = candidates[_repeated_rows(doc, codes, candidates, n)]
    covered[(repeated[:, None] + np.arange(n)).ravel()] = True  # the words of each repeated n-gram
    return covered


def _windows_of_repeated_words(doc: np.ndarray, keys: np.ndarray, n: int) -> np.ndarray:
    """The first words of the n-grams none of whose words surely occurs once in its document.
    A hash of (document, key) per word is counted per bucket of its top bits, the words left
    per bucket of the bits below those: equal pairs share every bucket, so a word that occurs
    twice is never ruled out (most words of prose occur once in their document). The arrays of
    a word each are this thread's scratch arrays (see _quality.scratch)."""
    m = len(keys)
    if m < n:
        return np.zeros(0, dtype=np.int64)
    h = scratch("ngrams.hash", m, np.uint64)
    np.copyto(h, doc, casting="unsafe")  # the same bits (documents are counted from 0)
    with np.errstate(over="ignore"):
        h *= _MULTIPLIER
        h += np.ascontiguousarray(keys).view(np.uint64)
        h *= _MULTIPLIER
    bits = _bucket_bits(m)
    buckets = scratch("ngrams.buckets", m, np.uint64)
    np.right_shift(h, np.uint64(64 - bits), out=buckets)
    maybe = scratch("ngrams.maybe", m, np.bool_)
    np.greater(_bucket_sizes(buckets.view(np.intp), bits), 1, out=maybe)  # below 2**24: the same bits
    left = np.flatnonzero(maybe)
    if len(left):
        low = _bucket_bits(len(left))
        buckets = np.take(h, left)
        buckets >>= np.uint64(64 - bits - low)
        buckets &= np.uint64((1 << low) - 1)
        maybe[left] = _bucket_sizes(buckets.view(np.intp), low) > 1
    # n flagged words in a row: the flags ANDed with the next n - 1 words' flags
    row = scratch("ngrams.row", m - n + 1, np.bool_)
    np.copyto(row, maybe[: m - n + 1])
    for k in range(1, n):
        row &= maybe[k : m - n + 1 + k]
    out: np.ndarray = np.flatnonzero(row)
    return out


def _bucket_sizes(buckets: np.ndarray, bits: int) -> np.ndarray:
    """Per item of ``buckets`` (bucket numbers below ``2**bits``): how many items share its
    bucket, in this thread's scratch arrays. Counted with ``np.add.at`` into a kept table
    (int32 into int32: numpy's fast path), where ``np.bincount`` would make a new table of
    eight bytes per bucket, faulted in page by page in a process whose malloc returns it."""
    if len(buckets) >= 1 << 31:  # past int32 counts (no batch comes near)
        out: np.ndarray = np.take(np.bincount(buckets, minlength=1 << bits), buckets)
        return out
    table = scratch("ngrams.table", 1 << bits, np.int32)
    table[:] = 0
    np.add.at(table, buckets, np.int32(1))
    # mode="clip": every bucket is in range; with the default mode numpy buffers ``out``
    return np.take(table, buckets, out=scratch("ngrams.sizes", len(buckets), np.int32), mode="clip")


def _window_keys_at(doc: np.ndarray, codes: np.ndarray, starts: np.ndarray, n: int) -> np.ndarray:
    """A 64-bit polynomial key of (document of the first word, the n word codes) for the n-gram
    starting at each word of ``starts`` (each with n - 1 words after it); a last multiplication
    spreads the last word's bits (its length sits in its top byte)."""
    words = np.ascontiguousarray(codes).view(np.uint64)
    with np.errstate(over="ignore"):
        h = doc[starts].astype(np.uint64)
        for k in range(n):
            h = h * _MULTIPLIER + words[starts + k]
        out: np.ndarray = h * _MULTIPLIER
    return out


def _repeated_rows(doc: np.ndarray, codes: np.ndarray, starts: np.ndarray, n: int) -> np.ndarray:
    """Per n-gram starting at word ``starts[i]`` (document ``doc[starts[i]]``, words
    ``codes[starts[i]:starts[i] + n]``): True when an equal n-gram of the same document is among
    them. The candidates are the n-grams whose key repeats (equal n-grams have equal keys and
    most n-grams of real text have a key of their own); they are compared exactly here, so a
    collision costs time, never a result."""
    out = np.zeros(len(starts), dtype=bool)
    if not len(starts):
        return out
    rows = np.stack([doc[starts], *(codes[starts + k] for k in range(n))], axis=1)
    order = np.lexsort(rows.T[::-1])  # equal rows end up next to each other
    ordered = rows[order]
    same = (ordered[1:] == ordered[:-1]).all(axis=1)
    twice = np.zeros(len(order), dtype=bool)
    twice[1:] |= same
    twice[:-1] |= same
    out[order] = twice
    return out


def _bucket_bits(keys: int) -> int:
    """Bits of a bucket number for ``keys`` keys: two to four buckets per key, within 2**10-2**24
    (more buckets rule out a few more keys but make a count table that stays less in cache)."""
    return min(max(keys.bit_length() + 1, 10), 24)


def _shared_keys(h: np.ndarray) -> np.ndarray:
    """Indices of the keys of ``h`` that occur more than once, in order. A count per bucket of the
    keys' top bits (two to four buckets per key) rules out most keys at once, a count per bucket
    of the low bits of the keys left rules out most of the rest; Arrow's hash table then numbers
    the few keys left (no sort). Equal keys share every bucket, so no repeated key is lost."""
    bits = _bucket_bits(len(h))
    buckets = (h >> np.uint64(64 - bits)).astype(np.intp)
    left = np.flatnonzero(np.bincount(buckets, minlength=1 << bits)[buckets] > 1)
    if not len(left):
        return left
    bits = _bucket_bits(len(left))
    buckets = (h[left] & np.uint64((1 << bits) - 1)).astype(np.intp)
    left = left[np.bincount(buckets, minlength=1 << bits)[buckets] > 1]
    if not len(left):
        return left
    numbered = np.asarray(pc.dictionary_encode(pa.array(h[left])).indices.to_numpy(zero_copy_only=False), np.int64)
    out: np.ndarray = left[np.bincount(numbered)[numbered] > 1]
    return out


@dataclass(frozen=True, slots=True)
class RepeatedNgrams(QualityFilter):
    """Keep documents where at most ``maximum`` of the word characters lie inside word
    ``n``-grams that occur more than once in the document (each character counted once).

    Defaults n = 5, 0.15: the duplicate 5-gram character fraction of Rae et al. 2021, "Scaling
    Language Models: Methods, Analysis & Insights from Training Gopher", appendix A (from
    memory; the paper uses 0.14 for n = 6 down to 0.10 for n = 10).
    """

    kind: ClassVar[str] = "repeated_ngrams"

    n: int = 5
    maximum: float = 0.15

    def __post_init__(self) -> None:
        parse_int("n", self.n, minimum=1, maximum=64)
        object.__setattr__(self, "maximum", parse_float("maximum", self.maximum, minimum=0.0, maximum=1.0))

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: characters in repeated n-grams / word characters."""
        table = word_table(docs)
        covered = covered_by_repeats(table.doc, table.keys, self.n, table.exact)
        held = np.flatnonzero(covered)  # few words: summed per document by their document index
        inside = np.bincount(table.doc[held], weights=table.chars[held], minlength=table.documents)
        return share(inside, table.chars_per_document.astype(np.float64))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        return np.asarray(self.measure(docs) <= self.maximum, dtype=bool)
