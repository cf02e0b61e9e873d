"""Source readers: the recipe's ``[[sources]]`` entries, one kind per module.

``parse_source(table, path)`` builds the kind named by ``table["kind"]``;
:mod:`seqpipe.sources.base` describes the resolve / plan / read protocol.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Final

from seqpipe._parse import _show, section
from seqpipe.errors import RecipeError
from seqpipe.sources.arrow import ArrowSource
from seqpipe.sources.base import Part, ReadStats, RecordSource, Source
from seqpipe.sources.jsonl import JsonlSource
from seqpipe.sources.parquet import ParquetSource
from seqpipe.sources.text import TextSource

SOURCE_KINDS: Final[dict[str, type[Source]]] = {
    cls.kind: cls for cls in (TextSource, JsonlSource, ParquetSource, ArrowSource)
}


def parse_source(table: Any, path: str) -> Source:
    """The source described by recipe table ``table`` found at key path ``path``."""
    kinds = ", ".join(repr(k) for k in SOURCE_KINDS)
    if not isinstance(table, Mapping):
        raise RecipeError(path, f"expected a table, got {_show(table)}")
    if "kind" not in table:
        raise RecipeError(f"{path}.kind", f"missing; expected one of {kinds}")
    kind = table["kind"]
    if not isinstance(kind, str) or kind not in SOURCE_KINDS:
        raise RecipeError(f"{path}.kind", f"unknown source kind {_show(kind)}; expected one of {kinds}")
    return section(SOURCE_KINDS[kind], table, path, skip=("kind",))


__all__ = [
    "SOURCE_KINDS",
    "ArrowSource",
    "JsonlSource",
    "ParquetSource",
    "Part",
    "ReadStats",
    "RecordSource",
    "Source",
    "TextSource",
    "parse_source",
]
