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
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

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


def per_document_sum(flags: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Per document: how many of ``flags`` (one per byte) are true within its byte range."""
    total = np.zeros(len(flags) + 1, dtype=np.int64)
    np.cumsum(flags, out=total[1:])
    out: np.ndarray = total[offsets[1:]] - total[offsets[:-1]]
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
    encoded = pc.dictionary_encode(pieces.text)
    codes = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64)
    # one int64 key per (document, piece): exact, since documents * distinct pieces < 2**63
    keys = pieces.doc * np.int64(len(encoded.dictionary)) + codes
    _, first = np.unique(keys, return_index=True)
    seen_before = np.ones(len(codes), dtype=bool)
    seen_before[first] = False
    return seen_before
