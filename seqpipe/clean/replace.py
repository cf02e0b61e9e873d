"""``kind = "replace"``: replace every match of a Unicode-aware regular expression."""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any, ClassVar

import pyarrow as pa
import regex

from seqpipe import _patterns
from seqpipe._parse import parse_str
from seqpipe.clean.base import CleanStep, as_documents
from seqpipe.errors import RecipeError


@functools.lru_cache(maxsize=64)
def _compiled(pattern: str) -> Any:
    # One compile per pattern and process; frozen steps cannot hold the object as a
    # field without it reaching the canonical recipe.
    return regex.compile(pattern, regex.VERSION1)


@dataclass(frozen=True, slots=True)
class Replace(CleanStep):
    """Replace each match of ``pattern`` with the literal text ``replacement``.

    ``pattern`` uses the ``regex`` module's syntax (VERSION1: Unicode properties such
    as ``\\p{L}``, set operations); ``replacement`` is inserted as is (no group
    references). One ``regex.sub`` call (C) per document: RE2 in pyarrow compute
    lacks parts of this syntax and its Unicode tables differ from ``regex``'s.
    """

    kind: ClassVar[str] = "replace"

    pattern: str = ""
    replacement: str = " "

    def __post_init__(self) -> None:
        if self.pattern == "":
            raise RecipeError("pattern", "missing: expected the regular expression to replace")
        parse_str("pattern", self.pattern)
        parse_str("replacement", self.replacement, allow_empty=True)
        try:
            _compiled(self.pattern)
        except regex.error as exc:
            raise RecipeError("pattern", f"not a valid regular expression ({exc}): {self.pattern!r}") from None

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents with every match replaced."""
        docs = as_documents(docs)
        sub = _compiled(self.pattern).sub
        # The replacement is a template to regex.sub; doubling each backslash makes it literal
        # (no "\1" or "\g<name>" expansion) while still running in C, not a call per match.
        literal = self.replacement.replace("\\", "\\\\")
        texts = docs.to_pylist()
        limit = _patterns.SECONDS_PER_DOCUMENT
        out = []
        for d, text in enumerate(texts):
            try:
                out.append(sub(literal, text, timeout=limit))
            except TimeoutError:
                raise _patterns.pattern_timeout("replace", self.pattern, d, text) from None
        return pa.array(out, type=pa.large_string())
