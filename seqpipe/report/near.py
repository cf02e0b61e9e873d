"""Near-copies across splits: evaluation documents with a near-copy in train, whether or not the
build removed near-duplicates.

The scheme is the build's ``near_dedupe`` step (:mod:`seqpipe.clean.near_dedupe`): MinHash
signatures over word shingles of each document's text, ``bands`` bands of ``rows`` values,
candidates sharing a whole band, confirmed when the estimated Jaccard similarity (the share of
equal signature values) reaches ``threshold``. Its parameters come from the dataset's recipe
when it has that step, else are the step's defaults. A document's text is its content ids
decoded by the dataset's encoder (the text as tokenized, so both sides are read alike).

Memory: per train document one 8-byte entry per band (sorted) and its index; the train
signatures go to a temporary file and only the candidates' rows are read back.
"""

from __future__ import annotations

import itertools
import tempfile
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import numpy as np
import pyarrow as pa

from seqpipe.clean.near_dedupe import NearDedupe
from seqpipe.errors import SeqpipeError
from seqpipe.report.corpus import SplitTokens

MAX_EXAMPLES: Final = 5
# Train documents looked at per band bucket: a bucket shared by many train documents (say, a
# boilerplate paragraph) gives its first ones, which agree on that band anyway.
MAX_BUCKET: Final = 32
BATCH_TOKENS: Final = 1 << 16
_EMPTY: Final = np.uint32(0xFFFFFFFF)
_MULT: Final = np.uint64(0x9E3779B97F4A7C15)


def scheme(manifest: dict[str, Any] | None) -> tuple[NearDedupe, str]:
    """The recipe's ``near_dedupe`` step (or the step's defaults) and which of the two it is."""
    steps = ((manifest or {}).get("recipe") or {}).get("clean") or []
    for step in steps:
        if isinstance(step, dict) and step.get("kind") == NearDedupe.kind:
            keys = ("shingle", "bands", "rows", "threshold", "seed")
            return NearDedupe(**{k: step[k] for k in keys if k in step}), "recipe"
    return NearDedupe(), "defaults"


def _texts(chunk: SplitTokens, decode: Callable[[np.ndarray], str]) -> tuple[pa.Array, np.ndarray]:
    """Decoded text of each non-empty document of the chunk, and those documents' indexes."""
    keep = np.flatnonzero(chunk.content_lengths > 0)
    starts, lengths = chunk.content_starts[keep].tolist(), chunk.content_lengths[keep].tolist()
    # one decode per document (documents have variable length), none per token
    texts = [decode(chunk.ids[a : a + m]) for a, m in zip(starts, lengths, strict=True)]
    return pa.array(texts, type=pa.large_string()), keep


def _signatures(step: NearDedupe, chunk: SplitTokens, decode: Callable[[np.ndarray], str]) -> tuple[Any, Any]:
    """Signatures of the chunk's documents that have words, and those documents' indexes; made
    for groups of about BATCH_TOKENS tokens, which bounds the per-shingle temporaries."""
    texts, keep = _texts(chunk, decode)
    sig = np.zeros((len(texts), step.hashes), np.uint32)
    sizes = np.cumsum(chunk.content_lengths[keep])
    cuts = [0, *np.searchsorted(sizes, np.arange(BATCH_TOKENS, int(sizes[-1]) if len(sizes) else 0, BATCH_TOKENS))]
    for a, b in itertools.pairwise(sorted({*(int(c) for c in cuts), len(texts)})):
        sig[a:b] = step.signatures(texts.slice(a, b - a))
    words = ~(sig == _EMPTY).all(axis=1)  # a document without words has no shingles to compare
    return sig[words], keep[words]


def band_keys(sig: np.ndarray, bands: int, rows: int) -> np.ndarray:
    """(documents, bands) uint64: one key per band of each signature (equal band values, equal key;
    the band's number is mixed in, so keys of different bands do not meet)."""
    out = np.zeros((len(sig), bands), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for b in range(bands):
            acc = np.full(len(sig), np.uint64(b + 1) * _MULT, dtype=np.uint64)
            for r in range(rows):
                acc = (acc ^ sig[:, b * rows + r].astype(np.uint64)) * _MULT
                acc ^= acc >> np.uint64(29)
            out[:, b] = acc
    return out


_LOW: Final = np.uint64(0xFFFFFFFF)


@dataclass(frozen=True, slots=True)
class TrainBands:
    """One 8-byte entry per band of each train document that has words, sorted: the band key's
    high 32 bits above the document's row in the signature file (a false match of the 32 key bits
    only adds a candidate, which the similarity check drops)."""

    entries: np.ndarray  # uint64, sorted
    docs: np.ndarray  # int64: the train document of each signature file row
    path: Path
    hashes: int

    @classmethod
    def of(
        cls, step: NearDedupe, chunks: Iterable[SplitTokens], decode: Callable[[np.ndarray], str], path: Path, size: int
    ) -> TrainBands:
        """``size``: the train split's number of documents (room for every entry, filled in place)."""
        entries = np.empty(size * step.bands, dtype=np.uint64)
        docs, done, written = [], 0, 0
        with open(path, "wb") as fh:
            for chunk in chunks:
                sig, idx = _signatures(step, chunk, decode)
                np.ascontiguousarray(sig).tofile(fh)
                keys = band_keys(sig, step.bands, step.rows) & ~_LOW
                keys |= np.arange(written, written + len(sig), dtype=np.uint64)[:, None]
                entries[written * step.bands : (written + len(sig)) * step.bands] = keys.ravel()
                docs.append(idx + done)
                done += chunk.num_documents
                written += len(sig)
        entries = entries[: written * step.bands]
        entries.sort()
        doc = np.concatenate(docs).astype(np.int64) if docs else np.zeros(0, np.int64)
        return cls(entries, doc, path, step.hashes)

    def signatures(self, rows: np.ndarray) -> np.ndarray:
        """The train signatures at file rows ``rows`` (read from disk)."""
        if len(rows) == 0 or self.path.stat().st_size == 0:
            return np.zeros((len(rows), self.hashes), np.uint32)
        table = np.memmap(self.path, dtype=np.uint32, mode="r").reshape(-1, self.hashes)
        return np.array(table[rows])


def _candidates(train: TrainBands, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pairs (query row, train signature row) of equal band keys (high 32 bits), at most MAX_BUCKET per key."""
    flat = keys.ravel() & ~_LOW
    lo = np.searchsorted(train.entries, flat, side="left")
    hi = np.minimum(np.searchsorted(train.entries, flat | _LOW, side="right"), lo + MAX_BUCKET)
    count = hi - lo
    query = np.repeat(np.arange(len(flat)) // keys.shape[1], count)
    pos = np.repeat(lo, count) + (np.arange(int(count.sum())) - np.repeat(np.cumsum(count) - count, count))
    return query, (train.entries[pos] & _LOW).astype(np.int64)


def near_copies(
    step: NearDedupe, train: TrainBands, chunks: Iterable[SplitTokens], decode: Callable[[np.ndarray], str]
) -> dict[str, Any]:
    """Count the documents of one split that have a near-copy in train, with a few examples."""
    documents = checked = found = 0
    examples: list[dict[str, Any]] = []
    for chunk in chunks:
        sig, idx = _signatures(step, chunk, decode)
        query, rows = _candidates(train, band_keys(sig, step.bands, step.rows))
        pairs = np.unique(np.stack([query, rows], axis=1), axis=0) if len(query) else np.zeros((0, 2), int)
        sim = (sig[pairs[:, 0]] == train.signatures(pairs[:, 1])).mean(axis=1) if len(pairs) else np.zeros(0)
        hit = sim >= step.threshold
        best = np.full(len(sig), -1.0)
        np.maximum.at(best, pairs[hit, 0], sim[hit])
        near = np.flatnonzero(best >= 0)
        for q in near[: MAX_EXAMPLES - len(examples)].tolist():
            j = np.flatnonzero(hit & (pairs[:, 0] == q) & (sim == best[q]))[0]
            examples.append(
                {
                    "document": documents + int(idx[q]),
                    "train_document": int(train.docs[pairs[j, 1]]),
                    "similarity": float(best[q]),
                }
            )
        documents += chunk.num_documents
        checked += len(sig)
        found += len(near)
    return {
        "documents": documents,
        "checked": checked,
        "near_copies": found,
        "share": found / checked if checked else None,
        "examples": examples,
    }


def leakage_section(
    manifest: dict[str, Any] | None,
    train_chunks: Iterable[SplitTokens],
    train_documents: int,
    others: Mapping[str, Iterable[SplitTokens]],
    decode: Callable[[np.ndarray], str],
) -> dict[str, Any]:
    """The report's ``leakage.near_copies`` entry: the scheme used and, per other split, its figures."""
    step, origin = scheme(manifest)
    try:
        with tempfile.TemporaryDirectory(prefix="seqpipe-report-") as tmp:
            path = Path(tmp) / "train-signatures.u32"
            train = TrainBands.of(step, train_chunks, decode, path, train_documents)
            splits = {name: near_copies(step, train, chunks, decode) for name, chunks in others.items()}
    except OSError as exc:
        raise SeqpipeError(f"near-copy check: cannot write the train signatures to a temporary file ({exc})") from exc
    return {
        "parameters": {
            "from": origin,
            "shingle": step.shingle,
            "bands": step.bands,
            "rows": step.rows,
            "threshold": step.threshold,
            "seed": step.seed,
        },
        "splits": splits,
    }
