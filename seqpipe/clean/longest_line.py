"""``kind = "longest_line"``: drop documents with a line longer than a number of code points."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa

from seqpipe._parse import parse_int
from seqpipe.clean._quality import QualityFilter, lines


@dataclass(frozen=True, slots=True)
class LongestLine(QualityFilter):
    """Keep documents whose longest line has at most ``characters`` code points.

    Minified code, base64 blobs and text that lost its line breaks have very long lines.
    The default 1000 is common practice (a generous bound for prose paragraphs written as
    one line); it is not taken from a paper.
    """

    kind: ClassVar[str] = "longest_line"

    characters: int = 1000

    def __post_init__(self) -> None:
        parse_int("characters", self.characters, minimum=1)

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: code points of its longest line (0 for an empty document)."""
        pieces = lines(docs)
        longest = np.zeros(pieces.documents, dtype=np.int64)
        np.maximum.at(longest, pieces.doc, pieces.lengths())
        return longest

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        return np.asarray(self.measure(docs) <= self.characters, dtype=bool)
