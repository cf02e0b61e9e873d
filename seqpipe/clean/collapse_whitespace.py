"""``kind = "collapse_whitespace"``: runs of whitespace become one space; ends trimmed."""

from __future__ import annotations

import functools
import sys
from dataclasses import dataclass
from typing import ClassVar

import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_bool
from seqpipe.clean.base import CleanStep, as_documents, re2_class


@functools.cache
def _classes() -> tuple[str, str]:
    """RE2 classes of Python's whitespace (str.isspace / str.split), and of it without the line
    feed; found on first use by scanning every code point (kept off import: most builds never need it)."""
    whitespace = [chr(cp) for cp in range(sys.maxunicode + 1) if chr(cp).isspace()]
    return re2_class(whitespace), re2_class([c for c in whitespace if c != "\n"])


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
        any_ws, not_newline = _classes()
        if self.keep_newlines:
            docs = pc.replace_substring_regex(docs, pattern=f"{any_ws}*\\n{any_ws}*", replacement="\n")
            docs = pc.replace_substring_regex(docs, pattern=f"{not_newline}+", replacement=" ")
            out: pa.Array = pc.utf8_trim(docs, characters=" \n")
            return out
        docs = pc.replace_substring_regex(docs, pattern=f"{any_ws}+", replacement=" ")
        out = pc.utf8_trim(docs, characters=" ")
        return out
