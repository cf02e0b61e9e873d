"""``kind = "strip_control"``: drop control and format characters (categories Cc, Cf)."""

from __future__ import annotations

import functools
import sys
import unicodedata
from dataclasses import dataclass
from typing import ClassVar

import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_str
from seqpipe.clean.base import CleanStep, as_documents, re2_class


@functools.lru_cache(maxsize=16)
def control_characters(keep: str) -> tuple[str, ...]:
    """Every code point of category Cc or Cf (Python's Unicode tables) not in ``keep``."""
    return tuple(
        chr(cp)
        for cp in range(sys.maxunicode + 1)
        if unicodedata.category(chr(cp)) in ("Cc", "Cf") and chr(cp) not in keep
    )


@functools.lru_cache(maxsize=16)
def _pattern(keep: str) -> str:
    return re2_class(list(control_characters(keep)))


@dataclass(frozen=True, slots=True)
class StripControl(CleanStep):
    """Remove characters of category Cc or Cf, except those in ``keep``.

    Cc covers NUL, the C0/C1 controls and DEL; Cf covers format characters such as
    U+200B..U+200F, U+2060 and U+FEFF (a byte order mark inside text). The set is
    taken from Python's ``unicodedata`` and handed to ``pc.replace_substring_regex``
    as an explicit RE2 class of code points, so the work runs in C and does not
    depend on RE2's own category tables.
    """

    kind: ClassVar[str] = "strip_control"

    keep: str = "\n\t"

    def __post_init__(self) -> None:
        parse_str("keep", self.keep, allow_empty=True)

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents without the control and format characters."""
        docs = as_documents(docs)
        if not len(docs):
            return docs
        out: pa.Array = pc.replace_substring_regex(docs, pattern=_pattern(self.keep), replacement="")
        return out
