"""``kind = "repeated_ngrams"``: drop documents where much of the text sits in repeated word n-grams."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float, parse_int
from seqpipe.clean._quality import Pieces, QualityFilter, share, words

_MULTIPLIER: Final = np.uint64(0x9E3779B97F4A7C15)  # odd, with bits spread over the whole word


def covered_by_repeats(pieces: Pieces, n: int) -> np.ndarray:
    """Per word: True when it lies inside a word n-gram that occurs more than once in its document."""
    m = len(pieces.text)
    covered = np.zeros(m, dtype=bool)
    if m < n:
        return covered
    codes = pieces.encoded()[1]
    starts = np.arange(m - n + 1)
    same_doc = pieces.doc[starts] == pieces.doc[starts + n - 1]  # docs are contiguous
    starts = starts[same_doc]
    if not len(starts):
        return covered
    dup_starts = starts[_repeated_rows(pieces.doc[starts], codes, starts, n)]
    # +1 where a repeated n-gram starts, -1 after it ends
    edges = np.bincount(dup_starts, minlength=m + 1) - np.bincount(dup_starts + n, minlength=m + 1)
    covered = np.cumsum(edges[:m]) > 0
    return covered


def _repeated_rows(doc: np.ndarray, codes: np.ndarray, starts: np.ndarray, n: int) -> np.ndarray:
    """Per n-gram (document ``doc[i]``, words ``codes[starts[i]:starts[i] + n]``): True when an
    equal n-gram of the same document exists. A 64-bit polynomial key per row finds the
    candidates (equal rows have equal keys; most rows of real text have a key of their own), and
    only the candidates' rows are compared exactly, so a collision costs time, never a result."""
    with np.errstate(over="ignore"):
        h = doc.astype(np.uint64)
        for k in range(n):
            h = h * _MULTIPLIER + codes[starts + k].astype(np.uint64)
    out = np.zeros(len(h), dtype=bool)
    candidates = _shared_keys(h)
    if not len(candidates):
        return out
    at = starts[candidates]
    rows = np.stack([doc[candidates], *(codes[at + k] for k in range(n))], axis=1)
    _, inverse, counts = np.unique(rows, axis=0, return_inverse=True, return_counts=True)
    out[candidates] = counts[inverse.ravel()] > 1
    return out


def _shared_keys(h: np.ndarray) -> np.ndarray:
    """Indices of the keys of ``h`` that occur more than once, in order. A count per bucket of the
    keys' top bits (about four buckets per key) rules out most keys at once; Arrow's hash table
    then numbers the keys left (no sort)."""
    bits = min(max(len(h).bit_length() + 2, 10), 24)
    buckets = (h >> np.uint64(64 - bits)).astype(np.intp)
    left = np.flatnonzero(np.bincount(buckets, minlength=1 << bits)[buckets] > 1)
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
        pieces = words(docs)
        lengths = pieces.lengths().astype(np.float64)
        inside = pieces.per_document(np.where(covered_by_repeats(pieces, self.n), lengths, 0.0))
        return share(inside, pieces.per_document(lengths))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        return np.asarray(self.measure(docs) <= self.maximum, dtype=bool)
