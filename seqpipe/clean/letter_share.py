"""``kind = "letter_share"``: drop documents with too few letters among their visible characters."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float
from seqpipe.clean._quality import (
    RE2_SPACE_RUNS,
    QualityFilter,
    in_runs,
    per_document_sum,
    scratch,
    share,
    utf8_buffers,
    wide_code_points,
)
from seqpipe.clean.base import as_documents


def _is_letter(chars: pa.Array) -> pa.Array:
    return pc.match_substring_regex(chars, r"^\p{L}$")


@dataclass(frozen=True, slots=True)
class LetterShare(QualityFilter):
    """Keep documents where letters (Unicode category L) make up at least ``minimum`` of the
    characters that are not whitespace.

    Tables of numbers, dumps of symbols and markup score low. The default 0.5 is our own
    choice (common practice puts such a threshold between one half and four fifths); a
    document with no visible character scores 0 and is dropped. Counted with RE2 in pyarrow
    compute's rules (``\\p{L}``; ``\\s`` is ASCII whitespace but vertical tab): numpy counts over
    the batch's UTF-8 bytes, and RE2 classifies each distinct non-ASCII code point once.
    """

    kind: ClassVar[str] = "letter_share"

    minimum: float = 0.5

    def __post_init__(self) -> None:
        object.__setattr__(self, "minimum", parse_float("minimum", self.minimum, minimum=0.0, maximum=1.0))

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: letters / non-whitespace characters."""
        docs = as_documents(docs)
        data, offsets = utf8_buffers(docs)
        # visible: the first bytes of code points other than RE2 whitespace (so neither those
        # bytes nor the continuation bytes after each code point beyond ASCII); letters: ASCII
        # ones (b | 0x20 is a-z exactly for A-Z and a-z) and the code points beyond ASCII that
        # RE2 calls letters (asked once per distinct one)
        # the byte-sized arrays in this thread's scratch buffers (see _quality.scratch)
        flags = scratch("bytes.1", len(data), np.bool_)
        visible = np.diff(offsets) - per_document_sum(in_runs(data, RE2_SPACE_RUNS, out=flags), offsets)
        folded = scratch("bytes.2", len(data), np.uint8)
        np.bitwise_or(data, np.uint8(0x20), out=folded)
        folded -= np.uint8(ord("a"))  # in place (wraps below "a")
        letters = per_document_sum(np.less_equal(folded, np.uint8(25), out=flags), offsets)
        wide = wide_code_points(docs)
        if len(wide.at):
            doc = np.searchsorted(offsets, wide.at, side="right") - 1
            visible -= np.bincount(doc, weights=wide.size - 1, minlength=len(docs)).astype(np.int64)
            letters += np.bincount(doc[wide.classify(_is_letter)], minlength=len(docs))
        return share(letters.astype(np.float64), visible.astype(np.float64))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        m = self.measure(docs)
        return np.asarray((m >= self.minimum) & (m > 0), dtype=bool)
