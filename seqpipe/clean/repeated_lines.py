"""``kind = "repeated_lines"``: drop documents in which many lines repeat an earlier line."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa

from seqpipe._parse import parse_float
from seqpipe.clean._quality import QualityFilter, lines, repeated, share


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
        return share(pieces.per_document(repeated(pieces).astype(np.float64)), pieces.count().astype(np.float64))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        return np.asarray(self.measure(docs) <= self.maximum, dtype=bool)
