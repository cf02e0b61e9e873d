"""``kind = "min_length"``: drop documents shorter than a number of code points."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_int
from seqpipe.clean.base import CleanStep, as_documents


@dataclass(frozen=True, slots=True)
class MinLength(CleanStep):
    """Keep documents of at least ``characters`` code points (``pc.utf8_length``, C).

    Being a filter, it also exposes :meth:`keep`, the mask ``apply`` filters with, so
    the build can drop the matching rows of anything it tracks per document.
    """

    kind: ClassVar[str] = "min_length"

    characters: int = 1

    def __post_init__(self) -> None:
        parse_int("characters", self.characters, minimum=1)

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps."""
        mask = pc.greater_equal(pc.utf8_length(as_documents(docs)), self.characters)
        return np.asarray(mask.to_numpy(zero_copy_only=False), dtype=bool)

    def apply(self, docs: pa.Array) -> pa.Array:
        """The documents that are long enough, in order."""
        docs = as_documents(docs)
        out: pa.Array = docs.filter(pa.array(self.keep(docs)))
        return out
