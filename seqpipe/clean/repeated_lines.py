"""``kind = "repeated_lines"``: drop documents in which many lines repeat an earlier line."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float
from seqpipe.clean._quality import Pieces, QualityFilter, lines, repeated, share

_MIX: Final = np.uint64(0x9E3779B97F4A7C15)  # odd, with bits spread over the whole word


def repeated_per_document(pieces: Pieces) -> np.ndarray:
    """Per document: its lines equal to an earlier line of the same document (float64). Equal
    lines have equal byte lengths: only the documents with two lines of one (document, length)
    hash are compared line by line (few are: the lines of prose differ in length)."""
    out = np.zeros(pieces.documents, dtype=np.float64)
    if len(pieces.doc) < 2:
        return out
    size = np.asarray(pc.binary_length(pieces.text).to_numpy(zero_copy_only=False), dtype=np.int64)
    with np.errstate(over="ignore"):
        key = (pieces.doc.astype(np.uint64) * _MIX + size.astype(np.uint64)) * _MIX
    ordered = np.sort(key)  # a batch holds few lines (a line holds many bytes)
    twice = ordered[1:][ordered[1:] == ordered[:-1]]
    if not len(twice):
        return out
    maybe = np.zeros(pieces.documents, dtype=bool)
    maybe[pieces.doc[np.isin(key, twice)]] = True
    held = pieces.subset(maybe)
    out[maybe] = held.per_document(repeated(held).astype(np.float64))
    return out


@dataclass(frozen=True, slots=True)
class RepeatedLines(QualityFilter):
    """Keep documents where at most ``maximum`` of the non-empty lines repeat an earlier line
    of the same document (boilerplate, menus, scraped navigation).

    Default 0.30: the duplicate-line fraction threshold of Rae et al. 2021, "Scaling Language
    Models: Methods, Analysis & Insights from Training Gopher", appendix A (from memory).
    """

    kind: ClassVar[str] = "repeated_lines"

    maximum: float = 0.30

    def __post_init__(self) -> None:
        object.__setattr__(self, "maximum", parse_float("maximum", self.maximum, minimum=0.0, maximum=1.0))

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: repeated lines / non-empty lines."""
        pieces = lines(docs)
        return share(repeated_per_document(pieces), pieces.count().astype(np.float64))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        return np.asarray(self.measure(docs) <= self.maximum, dtype=bool)
