"""Train/evaluation overlap: duplicated documents and shared long n-grams.

(a) A document of another split *leaks* when its content id sequence also is the
content of some train document: XXH3-128 of each document's content ids (one
xxhash call per document, over a zero-copy view of the ids), matched with Arrow's
``index_in``. The documents table's text hash gives the same check on cleaned text.

(b) The share of an evaluation split's length-n windows (inside one document) whose
hash also occurs among the train windows; see
:func:`seqpipe.report.ngrams.window_hashes` for the hash and its collision bound.

Both are computed over groups of whole documents (:func:`seqpipe.report.corpus.read_chunks`):
what is kept between groups is 16 bytes and an index per train document and the set of
distinct train window hashes (:class:`WindowSet`). That set holds 8 bytes per distinct
window; past ``WINDOW_CAP`` hashes it keeps only those below ``2**64 / every`` (``every`` a
power of two, doubled as needed), and the shared share is then estimated on the evaluation
windows whose hash falls in the same range, with its standard error stated in the report.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import xxhash

from seqpipe.report.corpus import SplitTokens
from seqpipe.report.ngrams import distinct_sorted, runs, window_hashes

MAX_EXAMPLES: Final = 5
EXAMPLE_CHARS: Final = 120
# Distinct train window hashes kept exactly (8 bytes each); past it the set is sampled.
WINDOW_CAP: Final = 1 << 22


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


def _example(
    other: SplitTokens, doc: int, shown: int, train_doc: int, decode: Callable[[np.ndarray], str]
) -> dict[str, Any]:
    start, length = int(other.content_starts[doc]), int(other.content_lengths[doc])
    text = decode(other.ids[start : start + length])
    return {
        "document": shown,
        "train_document": train_doc,
        "tokens": length,
        "text": text if len(text) <= EXAMPLE_CHARS else text[:EXAMPLE_CHARS] + "...",
    }


@dataclass(frozen=True, slots=True)
class TrainDocuments:
    """The content hashes of the train split's non-empty documents and their indexes."""

    hashes: pa.Array
    index: np.ndarray

    @classmethod
    def of(cls, chunks: Iterable[SplitTokens]) -> TrainDocuments:
        parts, index, done = [], [], 0
        for chunk in chunks:
            h, keep = document_hashes(chunk)
            parts.append(h)
            index.append(keep + done)
            done += chunk.num_documents
        hashes = pa.concat_arrays(parts) if parts else pa.array([], type=pa.binary(16))
        return cls(hashes, np.concatenate(index) if index else np.zeros(0, np.int64))


def duplicate_documents_chunked(
    train: TrainDocuments,
    chunks: Iterable[SplitTokens],
    *,
    train_text: pa.Array | None,
    other_text: pa.Array | None,
    decode: Callable[[np.ndarray], str],
) -> dict[str, Any]:
    """:func:`duplicate_documents` over the groups of documents of the other split."""
    documents = checked = duplicated = tokens = 0
    examples: list[dict[str, Any]] = []
    for chunk in chunks:
        other_h, other_idx = document_hashes(chunk)
        where = _matches(other_h, train.hashes)
        hit = np.flatnonzero(where >= 0)
        for j in hit[: MAX_EXAMPLES - len(examples)].tolist():
            doc = int(other_idx[j])
            examples.append(_example(chunk, doc, documents + doc, int(train.index[where[j]]), decode))
        documents += chunk.num_documents
        checked += len(other_idx)
        duplicated += len(hit)
        tokens += int(chunk.content_lengths[other_idx[hit]].sum())
    out: dict[str, Any] = {
        "documents": documents,
        "checked": checked,
        "duplicated": duplicated,
        "share": duplicated / checked if checked else None,
        "duplicated_tokens": tokens,
        "examples": examples,
    }
    if train_text is not None and other_text is not None:
        out["text_duplicated"] = int(np.count_nonzero(_matches(other_text, train_text) >= 0))
    return out


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


@dataclass(slots=True)
class WindowSet:
    """Distinct train window hashes, sorted; only those below ``2**64 / every`` once more than
    ``cap`` were seen (see the module docstring)."""

    cap: int = WINDOW_CAP
    every: int = 1
    keys: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.uint64))

    def sampled(self, hashes: np.ndarray) -> np.ndarray:
        """The hashes that fall in the kept range (all while ``every`` is 1)."""
        if self.every == 1:
            return hashes
        out: np.ndarray = hashes[hashes < np.uint64(2**64 // self.every)]
        return out

    def add(self, hashes: np.ndarray) -> None:
        new = self.sampled(hashes)
        new.sort()
        joined = np.concatenate([self.keys, distinct_sorted(new)])
        del new
        joined.sort(kind="stable")  # two sorted runs: a merge
        self.keys = distinct_sorted(joined)
        while len(self.keys) > self.cap:
            self.every *= 2
            self.keys = self.keys[: int(np.searchsorted(self.keys, np.uint64(2**64 // self.every)))]

    @classmethod
    def of(cls, chunks: Iterable[SplitTokens], n: int, cap: int = WINDOW_CAP) -> WindowSet:
        out = cls(cap=cap)
        for chunk in chunks:
            out.add(window_hashes(chunk.ids, n, starts=chunk.content_starts, lengths=chunk.content_lengths))
        return out


def shared_ngrams_chunked(train: WindowSet, chunks: Iterable[SplitTokens], n: int) -> dict[str, Any]:
    """:func:`shared_ngrams` over groups of documents; estimated on a hash range once ``train`` is sampled."""
    windows = checked = shared = 0
    for chunk in chunks:
        hashes = window_hashes(chunk.ids, n, starts=chunk.content_starts, lengths=chunk.content_lengths)
        windows += len(hashes)
        hashes = train.sampled(hashes)
        hashes.sort()
        checked += len(hashes)
        if len(train.keys) and len(hashes):
            pos = np.minimum(np.searchsorted(train.keys, hashes), len(train.keys) - 1)
            shared += int(np.count_nonzero(train.keys[pos] == hashes))
    if train.every == 1:
        return {"n": n, "windows": windows, "shared": shared, "share": shared / windows if windows else None}
    share = shared / checked if checked else None
    return {
        "n": n,
        "windows": windows,
        "shared": round(share * windows) if share is not None else 0,
        "share": share,
        "sample": {
            "every": train.every,
            "windows": checked,
            "shared": shared,
            "standard_error": math.sqrt(share * (1 - share) / checked) if share is not None else None,
        },
    }


def train_window_hashes(train: SplitTokens, n: int) -> np.ndarray:
    """Distinct hashes of the train split's length-n windows (sorted)."""
    hashes = window_hashes(train.ids, n, starts=train.content_starts, lengths=train.content_lengths)
    hashes.sort()  # sort-based: numpy's unique is slower on these hashes (DEVELOPERS.md)
    distinct: np.ndarray = runs(hashes)[0]
    return distinct
