"""An in-memory dataset with the attributes the report reads, built from token lists.

For the report's tests, on data that was never built into a directory: each document is a
list of token strings; the vocabulary is counted on the ``train`` split with the usual reserved tokens
and ordering (:func:`seqpipe.vocab.build_vocabulary`), and tokens of other splits that it lacks
become the unknown id.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import xxhash

from seqpipe._hashing import hash_array, hash_json
from seqpipe.errors import DatasetError, EmptyCorpusError
from seqpipe.shards import id_dtype
from seqpipe.tokenizers.base import Encoder, VocabEncoder
from seqpipe.vocab import COUNTS_SCHEMA, VocabSpec, Vocabulary, build_vocabulary


@dataclass(frozen=True, slots=True)
class MemorySplit:
    """One split: its token stream and its documents table (as a built dataset has them)."""

    stream: np.ndarray
    documents: pa.Table

    @property
    def num_tokens(self) -> int:
        return len(self.stream)

    @property
    def num_documents(self) -> int:
        return int(self.documents.num_rows)


@dataclass(frozen=True, slots=True)
class MemoryDataset:
    """Splits held in memory, with a vocabulary and an encoder for decoding."""

    vocabulary: Vocabulary
    encoder: Encoder
    parts: Mapping[str, MemorySplit]
    fingerprint: str
    manifest: dict[str, Any] = field(default_factory=dict)

    @property
    def splits(self) -> tuple[str, ...]:
        return tuple(self.parts)

    def split(self, name: str) -> MemorySplit:
        """The split called ``name``."""
        try:
            return self.parts[name]
        except KeyError:
            raise DatasetError(f"no split {name!r}; the dataset has {', '.join(self.parts) or 'none'}") from None


class SpacedEncoder(VocabEncoder):
    """Decodes tokens joined by single spaces (the documents were given as token lists)."""

    def join(self, tokens: list[bytes]) -> str:
        return " ".join(t.decode("utf-8", errors="replace") for t in tokens)


def _documents_table(lengths: np.ndarray, texts: Sequence[str]) -> pa.Table:
    starts = np.cumsum(lengths) - lengths
    hashes = [xxhash.xxh3_128_digest(t.encode("utf-8")) for t in texts]
    return pa.table(
        {
            "start": pa.array(starts, pa.int64()),
            "length": pa.array(lengths, pa.int64()),
            "input": pa.array(np.zeros(len(lengths), np.int32), pa.int32()),
            "hash": pa.array(hashes, pa.binary(16)),
        }
    )


def dataset_from_documents(
    splits: Mapping[str, Sequence[Sequence[str]]], *, markers: bool = True, spec: VocabSpec | None = None
) -> MemoryDataset:
    """A :class:`MemoryDataset` from documents given as lists of token strings.

    ``markers`` puts the begin and end ids around every document, as a build does.
    """
    from seqpipe.tokenizers.words import WordTokenizer

    spec = spec or VocabSpec()
    train = splits.get("train")
    if not train:
        raise EmptyCorpusError("dataset_from_documents: a non-empty 'train' split is needed for the vocabulary")
    train_tokens = pa.array([t.encode("utf-8") for doc in train for t in doc], pa.binary())
    grouped = pa.table({"key": train_tokens, "count": pa.array(np.ones(len(train_tokens), np.int64))})
    counts = grouped.group_by("key").aggregate([("count", "sum")]).rename_columns(["key", "count"])
    vocab = build_vocabulary(counts.cast(COUNTS_SCHEMA), spec)
    dtype = id_dtype(len(vocab))
    begin, end = vocab.id_of("begin"), vocab.id_of("end")
    parts: dict[str, MemorySplit] = {}
    for name, docs in splits.items():
        flat = pa.array([t.encode("utf-8") for doc in docs for t in doc], pa.binary())
        content = vocab.lookup(flat) if len(flat) else np.zeros(0, np.int64)
        m = np.array([len(doc) for doc in docs], dtype=np.int64)
        lead = 1 if markers and begin is not None else 0
        tail = 1 if markers and end is not None else 0
        lengths = m + lead + tail
        stream = np.empty(int(lengths.sum()), dtype=dtype)
        offsets = np.cumsum(lengths) - lengths
        rank = np.arange(len(content), dtype=np.int64) - np.repeat(np.cumsum(m) - m, m)
        stream[np.repeat(offsets + lead, m) + rank] = content
        if lead:
            stream[offsets] = begin
        if tail:
            stream[offsets + lengths - 1] = end
        parts[name] = MemorySplit(stream=stream, documents=_documents_table(lengths, [" ".join(doc) for doc in docs]))
    fingerprint = hash_json({name: hash_array(p.stream) for name, p in parts.items()})
    encoder = SpacedEncoder(WordTokenizer(), vocab)
    return MemoryDataset(vocabulary=vocab, encoder=encoder, parts=parts, fingerprint=fingerprint)
