"""What the quality filters share: the filter base class and batch-wide word and line tables.

A quality filter keeps or drops whole documents by one measured property. Every measure is
computed for the whole batch at once with pyarrow compute and numpy: documents are split into
words (or lines) into one flat array with the index of the document each belongs to, and
per-document figures are sums (``np.bincount``) or maxima over that index. No Python call is
made per word.
"""

from __future__ import annotations

from abc import abstractmethod
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe.clean.base import CleanStep, as_documents


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

    def per_document(self, values: np.ndarray) -> np.ndarray:
        """Sum of ``values`` (one per piece) for each document."""
        return np.bincount(self.doc, weights=values, minlength=self.documents)

    def count(self) -> np.ndarray:
        """Pieces per document."""
        return np.bincount(self.doc, minlength=self.documents).astype(np.int64)

    def lengths(self) -> np.ndarray:
        """Code points of each piece."""
        return np.asarray(pc.utf8_length(self.text).to_numpy(zero_copy_only=False), dtype=np.int64)


def _pieces(docs: pa.Array, split: pa.Array) -> Pieces:
    lengths = np.asarray(pc.list_value_length(split).to_numpy(zero_copy_only=False), dtype=np.int64)
    flat = split.flatten().cast(pa.large_string())
    doc = np.repeat(np.arange(len(docs), dtype=np.int64), lengths)
    nonempty = np.asarray(pc.greater(pc.binary_length(flat), 0).to_numpy(zero_copy_only=False), dtype=bool)
    if not nonempty.all():
        flat, doc = flat.filter(pa.array(nonempty)), doc[nonempty]
    return Pieces(flat, doc, len(docs))


def words(docs: pa.Array) -> Pieces:
    """Whitespace-separated words of every document (Unicode whitespace)."""
    docs = as_documents(docs)
    # pyarrow 26's utf8_split_whitespace sometimes keeps a trailing whitespace character of the
    # array's last value inside its last word (it looks past the end of the data buffer; seen
    # on about 1 call in 3 for the same input): a non-blank sentinel value after the documents
    # gives every real value a well-defined next byte, and its own split is dropped again
    padded = pa.concat_arrays([docs, pa.array(["x"], docs.type)])
    return _pieces(docs, pc.utf8_split_whitespace(padded).slice(0, len(docs)))


def lines(docs: pa.Array) -> Pieces:
    """Non-empty lines of every document (split at ``\\n``; a trailing ``\\r`` stays in its line)."""
    docs = as_documents(docs)
    return _pieces(docs, pc.split_pattern(docs, "\n"))


def share(part: np.ndarray, whole: np.ndarray) -> np.ndarray:
    """``part / whole`` per document, 0 where ``whole`` is 0."""
    out = np.zeros(len(whole), dtype=np.float64)
    np.divide(part, whole, out=out, where=whole > 0)
    return out


def repeated(pieces: Pieces) -> np.ndarray:
    """Per piece: True when an equal piece came earlier in the same document."""
    if len(pieces.text) == 0:
        return np.zeros(0, dtype=bool)
    codes = np.asarray(pc.dictionary_encode(pieces.text).indices.to_numpy(zero_copy_only=False), dtype=np.int64)
    keys = np.stack([pieces.doc, codes], axis=1)
    _, first = np.unique(keys, axis=0, return_index=True)
    seen_before = np.ones(len(codes), dtype=bool)
    seen_before[first] = False
    return seen_before
