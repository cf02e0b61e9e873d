"""The interface every cleaning step implements, and helpers they share.

A step is one ``[[clean]]`` entry of a recipe: a frozen dataclass validated at
construction, whose ``apply`` maps a ``large_string`` array of documents to
another. Steps run in recipe order. A filter (a step that returns fewer
documents) also has ``keep(docs)``, the boolean mask it filters with.

Where pyarrow compute does exactly what the step means it is used (C, no
Python object per document); where it does not -- pyarrow's Unicode tables are
not Python's, so case mapping and normalization differ on some characters --
the step calls the standard library once per document, on the documents that
need it (see :func:`map_non_ascii`).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import to_plain


def as_documents(docs: pa.Array | pa.ChunkedArray) -> pa.Array:
    """``docs`` as one ``large_string`` array."""
    if isinstance(docs, pa.ChunkedArray):
        docs = docs.combine_chunks() if docs.num_chunks != 1 else docs.chunk(0)
    if not pa.types.is_large_string(docs.type):
        docs = docs.cast(pa.large_string())
    return docs


def map_selected(docs: pa.Array, mask: pa.Array, fn: Callable[[str], str]) -> pa.Array:
    """``docs`` with ``fn`` applied (one Python call each) to the documents where ``mask`` is true."""
    where = np.flatnonzero(mask.to_numpy(zero_copy_only=False))
    if not len(where):
        return docs
    changed = pa.array([fn(text) for text in docs.take(pa.array(where)).to_pylist()], type=pa.large_string())
    out: pa.Array = pc.replace_with_mask(docs, mask, changed)
    return out


def map_non_ascii(docs: pa.Array, fn: Callable[[str], str]) -> pa.Array:
    """``docs`` with ``fn`` applied to the documents holding any non-ASCII character.

    For steps where ASCII text maps to itself (normalization) or where an ASCII
    kernel has already done the work (``pc.ascii_lower``).
    """
    return map_selected(docs, pc.invert(pc.string_is_ascii(docs)), fn)


def re2_class(chars: list[str]) -> str:
    """An RE2 character class matching exactly ``chars`` (escaped as ``\\x{..}`` ranges)."""
    points = sorted({ord(c) for c in chars})
    ranges: list[tuple[int, int]] = []
    for cp in points:
        if ranges and ranges[-1][1] == cp - 1:
            ranges[-1] = (ranges[-1][0], cp)
        else:
            ranges.append((cp, cp))
    body = "".join(f"\\x{{{a:x}}}" if a == b else f"\\x{{{a:x}}}-\\x{{{b:x}}}" for a, b in ranges)
    return f"[{body}]"


@dataclass(frozen=True, slots=True)
class CleanStep(ABC):
    """One cleaning step; ``is_dedupe`` marks the step the build handles globally."""

    kind: ClassVar[str]
    is_dedupe: ClassVar[bool] = False

    @abstractmethod
    def apply(self, docs: pa.Array) -> pa.Array:
        """The cleaned documents (a ``large_string`` array)."""

    def to_dict(self) -> dict[str, Any]:
        """The step as a plain table (with its ``kind``), for canonical recipes."""
        plain: dict[str, Any] = to_plain(self)
        return plain
