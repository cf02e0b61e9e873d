"""``kind = "letter_share"``: drop documents with too few letters among their visible characters."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float
from seqpipe.clean._quality import QualityFilter, share
from seqpipe.clean.base import as_documents


@dataclass(frozen=True, slots=True)
class LetterShare(QualityFilter):
    """Keep documents where letters (Unicode category L) make up at least ``minimum`` of the
    characters that are not whitespace.

    Tables of numbers, dumps of symbols and markup score low. The default 0.5 is our own
    choice (common practice puts such a threshold between one half and four fifths); a
    document with no visible character scores 0 and is dropped. Counted with RE2 in pyarrow
    compute (``\\p{L}`` and ``\\s``), one C pass per batch.
    """

    kind: ClassVar[str] = "letter_share"

    minimum: float = 0.5

    def __post_init__(self) -> None:
        object.__setattr__(self, "minimum", parse_float("minimum", self.minimum, minimum=0.0, maximum=1.0))

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: letters / non-whitespace characters."""
        docs = as_documents(docs)
        letters = pc.count_substring_regex(docs, r"\p{L}").to_numpy(zero_copy_only=False)
        spaces = pc.count_substring_regex(docs, r"\s").to_numpy(zero_copy_only=False)
        visible = pc.utf8_length(docs).to_numpy(zero_copy_only=False) - spaces
        return share(np.asarray(letters, np.float64), np.asarray(visible, np.float64))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        m = self.measure(docs)
        return np.asarray((m >= self.minimum) & (m > 0), dtype=bool)
