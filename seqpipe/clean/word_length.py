"""``kind = "word_length"``: drop documents whose mean word length is out of range."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa

from seqpipe._parse import parse_float
from seqpipe.clean._quality import QualityFilter, share
from seqpipe.clean._word_table import word_table
from seqpipe.errors import RecipeError


@dataclass(frozen=True, slots=True)
class WordLength(QualityFilter):
    """Keep documents whose mean word length (code points per whitespace-separated word) lies
    in ``[minimum, maximum]``; a document without words is dropped.

    Defaults 3 and 10: the mean-word-length range of Rae et al. 2021, "Scaling Language
    Models: Methods, Analysis & Insights from Training Gopher", appendix A (from memory).
    Text in scripts written without spaces between words (Chinese, Japanese, Thai) has very
    long "words": leave this step out for such corpora.
    """

    kind: ClassVar[str] = "word_length"

    minimum: float = 3.0
    maximum: float = 10.0

    def __post_init__(self) -> None:
        low = parse_float("minimum", self.minimum, minimum=0.0)
        high = parse_float("maximum", self.maximum, minimum=0.0)
        if high < low:
            raise RecipeError("maximum", f"expected a number >= minimum ({low:g}), got {high:g}")
        object.__setattr__(self, "minimum", low)
        object.__setattr__(self, "maximum", high)

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: mean code points per word (0 without words)."""
        table = word_table(docs)
        return share(table.chars_per_document.astype(np.float64), table.count().astype(np.float64))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        m = self.measure(docs)
        return np.asarray((m >= self.minimum) & (m <= self.maximum) & (m > 0), dtype=bool)
