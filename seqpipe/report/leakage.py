"""Train/evaluation overlap: duplicated documents and shared long n-grams.

(a) A document of another split *leaks* when its content id sequence also is the
content of some train document: XXH3-128 of each document's content ids (one
xxhash call per document, over a zero-copy view of the ids), matched with Arrow's
``index_in``. The documents table's text hash gives the same check on cleaned text.

(b) The share of an evaluation split's length-n windows (inside one document) whose
hash also occurs among the train windows; see
:func:`seqpipe.report.ngrams.window_hashes` for the hash and its collision bound.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import xxhash

from seqpipe.report.corpus import SplitTokens
from seqpipe.report.ngrams import runs, window_hashes

MAX_EXAMPLES: Final = 5
EXAMPLE_CHARS: Final = 120


def document_hashes(split: SplitTokens) -> tuple[pa.Array, np.ndarray]:
    """XXH3-128 of each non-empty document's content ids, and the indexes of those documents.

    The ids are hashed in the stream's own dtype: every split of a dataset shares one
    vocabulary and so one id dtype (callers give all splits the same dtype).
    """
    ids = np.ascontiguousarray(split.ids)
    view = ids.data.cast("B")
    size = ids.dtype.itemsize
    keep = np.flatnonzero(split.content_lengths > 0)
    starts = (split.content_starts[keep] * size).tolist()
    ends = ((split.content_starts[keep] + split.content_lengths[keep]) * size).tolist()
    # one C call per document, not per token (documents have variable length)
    digests = [xxhash.xxh3_128_digest(view[a:b]) for a, b in zip(starts, ends, strict=True)]
    return pa.array(digests, type=pa.binary(16)), keep


def _matches(values: pa.Array, value_set: pa.Array) -> np.ndarray:
    """For each value, the position of its first occurrence in ``value_set``, or -1."""
    if len(values) == 0 or len(value_set) == 0:
        return np.full(len(values), -1, dtype=np.int64)
    pos = pc.index_in(values, value_set=value_set)
    return np.asarray(pc.fill_null(pos, -1).to_numpy(zero_copy_only=False), dtype=np.int64)


def duplicate_documents(
    train: SplitTokens,
    other: SplitTokens,
    *,
    train_text: pa.Array | None,
    other_text: pa.Array | None,
    decode: Callable[[np.ndarray], str],
) -> dict[str, Any]:
    """Documents of ``other`` whose content ids (and, separately, text hash) occur in train."""
    train_h, train_idx = document_hashes(train)
    other_h, other_idx = document_hashes(other)
    where = _matches(other_h, train_h)
    hit = np.flatnonzero(where >= 0)
    examples = []
    for j in hit[:MAX_EXAMPLES].tolist():
        doc = int(other_idx[j])
        start, length = int(other.content_starts[doc]), int(other.content_lengths[doc])
        text = decode(other.ids[start : start + length])
        examples.append(
            {
                "document": doc,
                "train_document": int(train_idx[where[j]]),
                "tokens": length,
                "text": text if len(text) <= EXAMPLE_CHARS else text[:EXAMPLE_CHARS] + "...",
            }
        )
    out: dict[str, Any] = {
        "documents": other.num_documents,
        "checked": len(other_idx),
        "duplicated": len(hit),
        "share": len(hit) / len(other_idx) if len(other_idx) else None,
        "duplicated_tokens": int(other.content_lengths[other_idx[hit]].sum()),
        "examples": examples,
    }
    if train_text is not None and other_text is not None:
        out["text_duplicated"] = int(np.count_nonzero(_matches(other_text, train_text) >= 0))
    return out


def shared_ngrams(train_hashes: np.ndarray, other: SplitTokens, n: int) -> dict[str, Any]:
    """Share of ``other``'s n-gram windows whose hash also occurs in train."""
    hashes = window_hashes(other.ids, n, starts=other.content_starts, lengths=other.content_lengths)
    hashes.sort()  # only counted: sorted queries make the binary search cache-friendly
    shared = np.zeros(len(hashes), dtype=bool)
    if len(train_hashes):
        pos = np.minimum(np.searchsorted(train_hashes, hashes), len(train_hashes) - 1)
        shared = train_hashes[pos] == hashes
    return {
        "n": n,
        "windows": len(hashes),
        "shared": int(np.count_nonzero(shared)),
        "share": float(shared.mean()) if len(hashes) else None,
    }


def train_window_hashes(train: SplitTokens, n: int) -> np.ndarray:
    """Distinct hashes of the train split's length-n windows (sorted)."""
    hashes = window_hashes(train.ids, n, starts=train.content_starts, lengths=train.content_lengths)
    hashes.sort()  # sort-based: numpy's unique is slower on these hashes (DEVELOPERS.md)
    distinct: np.ndarray = runs(hashes)[0]
    return distinct
