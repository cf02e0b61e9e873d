"""``kind = "dedupe"``: drop exact duplicate documents (a marker the build acts on)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import pyarrow as pa

from seqpipe.clean.base import CleanStep, as_documents


@dataclass(frozen=True, slots=True)
class Dedupe(CleanStep):
    """Marks that exact duplicates are dropped, keeping each document's first occurrence.

    Duplicates can sit in different files read by different workers, so a batch
    cannot see them: the build hashes each document as it stands at this step and
    compares the hashes across the whole corpus instead. ``apply`` therefore returns
    its input unchanged.
    """

    kind: ClassVar[str] = "dedupe"
    is_dedupe: ClassVar[bool] = True

    def apply(self, docs: pa.Array) -> pa.Array:
        """``docs`` unchanged (see the class docstring)."""
        return as_documents(docs)
