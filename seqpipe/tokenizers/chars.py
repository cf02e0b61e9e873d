"""Character tokenizer: Unicode code points, or extended grapheme clusters (UAX #29).

Code points are cut with numpy over the UTF-32 encoding of the batch (no Python call per
character); grapheme clusters use the ``regex`` module's ``\\X``, one call per document.
Decoding is lossless: tokens are concatenated.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import regex

from seqpipe._parse import parse_str
from seqpipe.errors import TokenizerError
from seqpipe.tokenizers._common import (
    DEFAULT_RESERVED,
    as_string_array,
    check_literal_fields,
    drop_reserved_counts,
    segment_with_reserved,
    segments_from_tokens,
    stored_vocabulary,
)
from seqpipe.tokenizers.base import Encoder, Segments, Tokenizer, VocabEncoder
from seqpipe.vocab import VocabSpec, build_vocabulary

_GRAPHEME = regex.compile(r"\X")


@dataclass(frozen=True, slots=True)
class CharTokenizer(Tokenizer):
    """One token per code point (``unit = "codepoint"``) or per grapheme cluster."""

    kind: ClassVar[str] = "chars"
    unit: str = "codepoint"
    # with literal_reserved, the names in reserved_names (synced from [vocabulary] reserved by the
    # recipe) are cut out of the text and encode as their reserved ids, e.g. redaction placeholders
    literal_reserved: bool = False
    reserved_names: tuple[str, ...] = DEFAULT_RESERVED

    def __post_init__(self) -> None:
        parse_str("unit", self.unit, choices=("codepoint", "grapheme"))
        check_literal_fields(self)

    def segment(self, texts: Sequence[str] | pa.Array) -> Segments:
        arr = as_string_array(texts)
        if self.literal_reserved:
            return segment_with_reserved(self._segment, arr, self.reserved_names)
        return self._segment(arr)

    def _segment(self, arr: pa.Array) -> Segments:
        if self.unit == "grapheme":
            found = [_GRAPHEME.findall(t) for t in arr.to_pylist()]
            lengths = np.fromiter((len(f) for f in found), dtype=np.int64, count=len(found))
            flat = pa.array([g for gs in found for g in gs], pa.large_string())
            return segments_from_tokens(flat, lengths)
        lengths = pc.utf8_length(arr).to_numpy(zero_copy_only=False).astype(np.int64)
        joined = "".join(arr.to_pylist())
        try:
            cps = np.frombuffer(joined.encode("utf-32-le"), dtype="<u4")
        except UnicodeEncodeError as exc:
            raise TokenizerError(
                f"text contains a lone surrogate at character {exc.start}; it has no UTF-8 form"
            ) from None
        uniq, first, inverse = np.unique(cps, return_index=True, return_inverse=True)
        # keys in first-occurrence order, like the other kinds
        order = np.argsort(first, kind="stable")
        rank = np.empty_like(order)
        rank[order] = np.arange(len(order))
        keys = pa.array([chr(int(c)).encode("utf-8") for c in uniq[order]], pa.binary())
        return Segments(keys, rank[inverse].astype(np.int32), lengths)

    def fit(self, counts: pa.Table, spec: VocabSpec, *, show: bool = False) -> Encoder:
        return VocabEncoder(self, build_vocabulary(self._counts(counts), spec))

    def _counts(self, counts: pa.Table) -> pa.Table:
        return drop_reserved_counts(counts, self.reserved_names) if self.literal_reserved else counts

    def load(self, directory: Path) -> Encoder:
        return VocabEncoder(self, stored_vocabulary(directory))
