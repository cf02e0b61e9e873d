"""Tokenizer kinds: one module per kind behind ``seqpipe.tokenizers.base.Tokenizer``."""

from __future__ import annotations

import importlib
from typing import Any, Final

from seqpipe._parse import parse_str, section
from seqpipe.errors import RecipeError
from seqpipe.tokenizers.base import Encoder, Segments, Tokenizer

# kind -> "module:Class"; imported on first use so optional kinds cost nothing.
TOKENIZER_KINDS: Final = {
    "bpe": "seqpipe.tokenizers.bpe:BpeTokenizer",
    "bytes": "seqpipe.tokenizers.utf8_bytes:ByteTokenizer",
    "chars": "seqpipe.tokenizers.chars:CharTokenizer",
    "words": "seqpipe.tokenizers.words:WordTokenizer",
}


def tokenizer_class(kind: str) -> type[Tokenizer]:
    """The class implementing tokenizer ``kind``."""
    module, _, name = TOKENIZER_KINDS[kind].partition(":")
    cls: type[Tokenizer] = getattr(importlib.import_module(module), name)
    return cls


def parse_tokenizer(table: Any, path: str = "tokenizer") -> Tokenizer:
    """Build a tokenizer from its recipe table (``kind`` picks the class)."""
    if not isinstance(table, dict):
        raise RecipeError(path, f"expected a table, got {table!r}")
    kind = parse_str(f"{path}.kind", table.get("kind", "words"), choices=sorted(TOKENIZER_KINDS))
    return section(tokenizer_class(kind), table, path, skip=("kind",))


__all__ = ["TOKENIZER_KINDS", "Encoder", "Segments", "Tokenizer", "parse_tokenizer", "tokenizer_class"]
