"""Byte tokenizer: one token per UTF-8 byte; decoding is lossless.

Works directly on the Arrow string array's data buffer: no Python call per byte.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar

import numpy as np
import pyarrow as pa

from seqpipe.tokenizers._common import (
    DEFAULT_RESERVED,
    as_string_array,
    check_literal_fields,
    drop_reserved_counts,
    segment_with_reserved,
    stored_vocabulary,
)
from seqpipe.tokenizers.base import Encoder, Segments, Tokenizer, VocabEncoder
from seqpipe.vocab import VocabSpec, build_vocabulary

_ALL_BYTES = [bytes([b]) for b in range(256)]


@dataclass(frozen=True, slots=True)
class ByteTokenizer(Tokenizer):
    """Bytes of the UTF-8 encoding. ``all_bytes`` keeps all 256 values in the vocabulary
    (so nothing is ever unknown) instead of only the bytes seen in training."""

    kind: ClassVar[str] = "bytes"
    # the vocabulary is the byte values: a [vocabulary] cap is refused at recipe load
    fixed_vocabulary: ClassVar[bool] = True
    all_bytes: bool = True
    # with literal_reserved, the names in reserved_names (synced from [vocabulary] reserved by the
    # recipe) are cut out of the text and encode as their reserved ids, e.g. redaction placeholders
    literal_reserved: bool = False
    reserved_names: tuple[str, ...] = DEFAULT_RESERVED

    def __post_init__(self) -> None:
        from seqpipe._parse import parse_bool

        parse_bool("all_bytes", self.all_bytes)
        check_literal_fields(self)

    def segment(self, texts: Sequence[str] | pa.Array) -> Segments:
        arr = as_string_array(texts)
        if self.literal_reserved:
            return segment_with_reserved(self._segment, arr, self.reserved_names)
        return self._segment(arr)

    def _segment(self, arr: pa.Array) -> Segments:
        offsets = np.frombuffer(arr.buffers()[1], dtype=np.int64)[arr.offset : arr.offset + len(arr) + 1]
        data = arr.buffers()[2]
        raw = (
            np.frombuffer(data, dtype=np.uint8)[offsets[0] : offsets[-1]]
            if data is not None and len(arr)
            else np.zeros(0, np.uint8)
        )
        lengths = np.diff(offsets).astype(np.int64)
        seen = np.zeros(256, dtype=bool)
        seen[raw] = True
        byte_values = np.flatnonzero(seen)
        remap = np.full(256, -1, dtype=np.int32)
        remap[byte_values] = np.arange(len(byte_values), dtype=np.int32)
        keys = pa.array([bytes([int(b)]) for b in byte_values], pa.binary())
        return Segments(keys, remap[raw], lengths)

    def fit(self, counts: pa.Table, spec: VocabSpec, *, show: bool = False) -> Encoder:
        return VocabEncoder(
            self, build_vocabulary(self._counts(counts), spec, always=_ALL_BYTES if self.all_bytes else ())
        )

    def _counts(self, counts: pa.Table) -> pa.Table:
        return drop_reserved_counts(counts, self.reserved_names) if self.literal_reserved else counts

    def load(self, directory: Path) -> Encoder:
        return VocabEncoder(self, stored_vocabulary(directory))
