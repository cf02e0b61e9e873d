"""Source readers: the recipe's ``[[sources]]`` entries, one kind per module.

``parse_source(table, path)`` builds the kind named by ``table["kind"]``;
:mod:`seqpipe.sources.base` describes the resolve / plan / read protocol.
"""

from __future__ import annotations

from typing import Any, Final

from seqpipe._parse import parse_kind
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
    return parse_kind(SOURCE_KINDS, table, path, "source kind")


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
