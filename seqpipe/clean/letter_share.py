"""``kind = "letter_share"``: drop documents with too few letters among their visible characters."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float
from seqpipe.clean._quality import QualityFilter, per_document_sum, share, utf8_buffers, wide_code_points
from seqpipe.clean.base import as_documents

# per byte value: an ASCII letter (what \p{L} matches below U+0080); RE2's \s, which is only
# tab, line feed, form feed, carriage return and space (RE2 syntax reference, "Perl classes")
_ASCII_LETTER: Final = np.array([chr(b).isascii() and chr(b).isalpha() for b in range(256)], dtype=bool)
_RE2_SPACE: Final = np.isin(np.arange(256), [9, 10, 12, 13, 32])
# per byte value: the first byte of a code point that is not RE2 whitespace (a visible character)
_VISIBLE: Final = ((np.arange(256) & 0xC0) != 0x80) & ~_RE2_SPACE


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
        # np.take: faster than fancy indexing on byte arrays (DEVELOPERS.md)
        visible = np.take(_VISIBLE, data)
        letter = np.take(_ASCII_LETTER, data)
        wide = wide_code_points(docs)  # first bytes of code points beyond ASCII
        if len(wide.at):
            letter[wide.at] = wide.classify(_is_letter)
        return share(
            per_document_sum(letter, offsets).astype(np.float64), per_document_sum(visible, offsets).astype(np.float64)
        )

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        m = self.measure(docs)
        return np.asarray((m >= self.minimum) & (m > 0), dtype=bool)
