"""Helpers shared by the vocabulary-based tokenizer kinds."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe.errors import TokenizerError
from seqpipe.tokenizers.base import Segments
from seqpipe.vocab import Vocabulary


def as_string_array(texts: Sequence[str] | pa.Array) -> pa.Array:
    """Documents as a ``large_string`` Arrow array."""
    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks()
    if isinstance(texts, pa.Array):
        return texts if texts.type == pa.large_string() else texts.cast(pa.large_string())
    try:
        return pa.array(list(texts), pa.large_string())
    except UnicodeEncodeError as exc:
        raise TokenizerError(
            f"text contains a lone surrogate ({exc.object[exc.start : exc.end]!r}); it has no UTF-8 form"
        ) from None
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise TokenizerError(f"expected a sequence of strings ({exc})") from None


def segments_from_tokens(flat: pa.Array, doc_lengths: np.ndarray) -> Segments:
    """Dictionary-encode a flat token array (string or binary) into :class:`Segments`."""
    if len(flat) == 0:
        return Segments(pa.array([], pa.binary()), np.zeros(0, np.int32), doc_lengths.astype(np.int64))
    enc = pc.dictionary_encode(flat)
    keys = enc.dictionary.cast(pa.binary())
    codes = enc.indices.to_numpy(zero_copy_only=False).astype(np.int32, copy=False)
    return Segments(keys, codes, doc_lengths.astype(np.int64))


def stored_vocabulary(directory: Path) -> Vocabulary:
    """The vocabulary a build stored in ``directory`` (every kind keeps it in the same file)."""
    return Vocabulary.load(directory / "vocab.arrow")
