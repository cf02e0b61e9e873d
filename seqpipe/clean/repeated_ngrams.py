"""``kind = "repeated_ngrams"``: drop documents where much of the text sits in repeated word n-grams."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float, parse_int
from seqpipe.clean._quality import Pieces, QualityFilter, mix64, share, words

_MULTIPLIER: Final = np.uint64(0x100000001B3)  # an odd multiplier between the words of an n-gram


def covered_by_repeats(pieces: Pieces, n: int) -> np.ndarray:
    """Per word: True when it lies inside a word n-gram that occurs more than once in its document."""
    m = len(pieces.text)
    covered = np.zeros(m, dtype=bool)
    if m < n:
        return covered
    codes = np.asarray(pc.dictionary_encode(pieces.text).indices.to_numpy(zero_copy_only=False), dtype=np.int64)
    starts = np.arange(m - n + 1)
    same_doc = pieces.doc[starts] == pieces.doc[starts + n - 1]  # docs are contiguous
    starts = starts[same_doc]
    if not len(starts):
        return covered
    dup_starts = starts[_repeated_rows(pieces.doc[starts], codes, starts, n)]
    edges = np.zeros(m + 1, dtype=np.int64)  # +1 where a repeated n-gram starts, -1 after it ends
    np.add.at(edges, dup_starts, 1)
    np.add.at(edges, dup_starts + n, -1)
    covered = np.cumsum(edges[:m]) > 0
    return covered


def _repeated_rows(doc: np.ndarray, codes: np.ndarray, starts: np.ndarray, n: int) -> np.ndarray:
    """Per n-gram (document ``doc[i]``, words ``codes[starts[i]:starts[i] + n]``): True when an
    equal n-gram of the same document exists. Sorted by a 64-bit hash of the row; rows with equal
    hashes are compared whole, and on a collision of unequal rows the rows themselves are sorted."""
    with np.errstate(over="ignore"):
        h = mix64(doc.astype(np.uint64))
        for k in range(n):
            h = mix64(h * _MULTIPLIER + codes[starts + k].astype(np.uint64))
    order = np.argsort(h, kind="stable")
    same = h[order[1:]] == h[order[:-1]]
    a, b = order[1:][same], order[:-1][same]
    equal = doc[a] == doc[b]
    for k in range(n):
        equal &= codes[starts[a] + k] == codes[starts[b] + k]
    if not equal.all():  # a hash collision: fall back to the exact (slower) row sort
        grams = np.stack([doc, *(codes[starts + k] for k in range(n))], axis=1)
        _, inverse, counts = np.unique(grams, axis=0, return_inverse=True, return_counts=True)
        out: np.ndarray = counts[inverse.ravel()] > 1
        return out
    in_group = np.zeros(len(h), dtype=bool)  # sorted position i has an equal neighbour
    in_group[1:] |= same
    in_group[:-1] |= same
    repeated = np.empty(len(h), dtype=bool)
    repeated[order] = in_group
    return repeated


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
