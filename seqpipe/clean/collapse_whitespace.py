"""``kind = "collapse_whitespace"``: runs of whitespace become one space; ends trimmed."""

from __future__ import annotations

import sys
from dataclasses import dataclass
from typing import ClassVar, Final

import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_bool
from seqpipe.clean.base import CleanStep, as_documents, re2_class

# Python's notion of whitespace (str.isspace / str.split), fixed here once.
WHITESPACE: Final = tuple(chr(cp) for cp in range(sys.maxunicode + 1) if chr(cp).isspace())
_ANY: Final = re2_class(list(WHITESPACE))
_NOT_NEWLINE: Final = re2_class([c for c in WHITESPACE if c != "\n"])


@dataclass(frozen=True, slots=True)
class CollapseWhitespace(CleanStep):
    """Replace each run of whitespace by one space and trim both ends.

    Whitespace is what ``str.isspace`` accepts (so ``keep_newlines = false`` gives
    exactly ``" ".join(text.split())``). With ``keep_newlines = true`` a run that
    holds a line feed becomes one ``"\\n"`` instead. Runs in C: RE2 replacements
    with explicit classes of those code points, then ``pc.utf8_trim``.
    """

    kind: ClassVar[str] = "collapse_whitespace"

    keep_newlines: bool = False

    def __post_init__(self) -> None:
        parse_bool("keep_newlines", self.keep_newlines)

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents with whitespace collapsed."""
        docs = as_documents(docs)
        if not len(docs):
            return docs
        if self.keep_newlines:
            docs = pc.replace_substring_regex(docs, pattern=f"{_ANY}*\\n{_ANY}*", replacement="\n")
            docs = pc.replace_substring_regex(docs, pattern=f"{_NOT_NEWLINE}+", replacement=" ")
            out: pa.Array = pc.utf8_trim(docs, characters=" \n")
            return out
        docs = pc.replace_substring_regex(docs, pattern=f"{_ANY}+", replacement=" ")
        out = pc.utf8_trim(docs, characters=" ")
        return out
