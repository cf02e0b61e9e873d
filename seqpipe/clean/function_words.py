"""``kind = "function_words"``: drop documents with too few common function words of a language."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_int, parse_str
from seqpipe.clean._quality import QualityFilter
from seqpipe.clean._word_table import word_table

# The English list is the one of Rae et al. 2021, "Scaling Language Models: Methods, Analysis &
# Insights from Training Gopher", appendix A (from memory). Other languages need a list chosen
# with the same care; none is offered rather than a guessed one.
FUNCTION_WORDS: Final[dict[str, tuple[str, ...]]] = {
    "en": ("the", "be", "to", "of", "and", "that", "have", "with"),
}


@dataclass(frozen=True, slots=True)
class FunctionWords(QualityFilter):
    """Keep documents holding at least ``minimum`` occurrences of the ``language``'s function
    words (whole whitespace-separated words, compared case-insensitively, with leading and
    trailing punctuation removed).

    Running prose of a language uses its function words all the time; word lists, tables,
    code and text in another language do not. Default 2 follows Rae et al. 2021 (Gopher),
    appendix A (from memory).
    """

    kind: ClassVar[str] = "function_words"

    language: str = "en"
    minimum: int = 2

    def __post_init__(self) -> None:
        parse_str("language", self.language, choices=tuple(FUNCTION_WORDS))
        parse_int("minimum", self.minimum, minimum=1)

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: occurrences of the language's function words."""
        table = word_table(docs)
        distinct, codes = table.distinct()  # each distinct word is judged once
        bare = pc.utf8_trim(pc.utf8_lower(distinct), characters="\"'()[]{}.,;:!?-\u2018\u2019\u201c\u201d")
        hit = pc.is_in(bare, value_set=pa.array(FUNCTION_WORDS[self.language], pa.large_string()))
        flags = np.asarray(hit.to_numpy(zero_copy_only=False), dtype=np.int64)[codes]
        return table.per_document(flags)

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        return np.asarray(self.measure(docs) >= self.minimum, dtype=bool)
