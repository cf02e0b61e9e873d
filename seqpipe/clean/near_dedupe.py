"""``kind = "near_dedupe"``: drop documents that nearly repeat an earlier one (a marker the build acts on).

Method: MinHash signatures over word shingles (Broder 1997, "On the resemblance and containment
of documents") and locality-sensitive banding (Rajaraman and Ullman, "Mining of Massive
Datasets", chapter 3). Each document's set of shingles (runs of ``shingle`` consecutive
whitespace-separated words) is summarised by ``bands * rows`` minimum hash values, one per seeded
hash function; two documents agree on one value with probability equal to the Jaccard
similarity of their shingle sets. Documents sharing all ``rows`` values of any band become
candidates (probability ``1 - (1 - s**rows)**bands`` at similarity ``s``); a candidate whose
estimated similarity (the share of equal values) reaches ``threshold`` with an earlier kept
document is dropped, so the first document of each group in corpus order stays.

Signatures are computed in the ingest tasks (numpy over the batch's UTF-8 bytes: no Python call
per word); only the comparison of colliding documents runs in the driver, one Python step per
such document.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa

from seqpipe._parse import parse_float, parse_int
from seqpipe.clean._quality import words
from seqpipe.clean.base import CleanStep, as_documents
from seqpipe.errors import RecipeError

# splitmix64 finalizer constants (the same as seqpipe.splits; Steele, Lea and Flood 2014)
_GOLDEN: Final = np.uint64(0x9E3779B97F4A7C15)
_MIX1: Final = np.uint64(0xBF58476D1CE4E5B9)
_MIX2: Final = np.uint64(0x94D049BB133111EB)
_BYTE_BASE: Final = np.uint64(0x100000001B3)  # an odd multiplier for the byte polynomial (FNV's prime)
_EMPTY: Final = np.uint32(0xFFFFFFFF)


def _mix(x: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        x = x ^ (x >> np.uint64(30))
        x = x * _MIX1
        x = x ^ (x >> np.uint64(27))
        x = x * _MIX2
        out: np.ndarray = x ^ (x >> np.uint64(31))
        return out


def _word_hashes(docs: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A 64-bit hash of each word's UTF-8 bytes (a polynomial over the bytes, then mixed), and the
    document of each word; computed with numpy over the whole batch."""
    pieces = words(docs)
    text = pieces.text
    n = len(text)
    if n == 0:
        return np.zeros(0, np.uint64), pieces.doc
    offsets = np.frombuffer(text.buffers()[1], dtype=np.int64)[text.offset : text.offset + n + 1]
    data = np.frombuffer(text.buffers()[2], dtype=np.uint8)[offsets[0] : offsets[-1]].astype(np.uint64)
    starts = offsets[:-1] - offsets[0]
    lengths = np.diff(offsets)
    position = np.arange(len(data), dtype=np.int64) - np.repeat(starts, lengths)
    powers = (
        np.cumprod(np.full(int(lengths.max()), _BYTE_BASE, dtype=np.uint64)) if len(data) else np.ones(1, np.uint64)
    )
    with np.errstate(over="ignore"):
        terms = (data + np.uint64(1)) * powers[position]
        sums = np.add.reduceat(terms, starts) if len(data) else np.zeros(n, np.uint64)
    return _mix(sums + lengths.astype(np.uint64)), pieces.doc


def _shingle_hashes(docs: pa.Array, size: int) -> tuple[np.ndarray, np.ndarray]:
    """A 64-bit hash per shingle (``size`` consecutive words of one document) and its document.
    A document with fewer words has one shingle of all its words; one without words has none."""
    word, doc = _word_hashes(docs)
    n = len(word)
    if n == 0:
        return word, doc
    first = np.ones(n, dtype=bool)
    first[1:] = doc[1:] != doc[:-1]
    run_start = np.flatnonzero(first)
    run_len = np.diff(np.append(run_start, n))
    count = np.maximum(run_len - size + 1, 1)  # shingles per document that has words
    starts = np.repeat(run_start, count) + (np.arange(int(count.sum())) - np.repeat(np.cumsum(count) - count, count))
    width = np.minimum(np.repeat(run_len, count), size)
    acc = np.zeros(len(starts), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for k in range(size):  # a loop over shingle positions, not over words
            inside = k < width
            value = word[np.minimum(starts + k, n - 1)]
            acc = np.where(inside, _mix(acc * _BYTE_BASE + value), acc)
    return acc, doc[starts]


def seeds(count: int, seed: int) -> np.ndarray:
    """``count`` 64-bit seeds, one per hash function, from the step's ``seed``."""
    with np.errstate(over="ignore"):
        base = np.uint64(seed) * _GOLDEN + np.arange(1, count + 1, dtype=np.uint64) * _GOLDEN
    return _mix(base)


def signatures(docs: pa.Array, *, shingle: int, hashes: int, seed: int) -> np.ndarray:
    """(documents, hashes) uint32 MinHash signatures; a document without words gets all 0xFFFFFFFF."""
    docs = as_documents(docs)
    values, doc = _shingle_hashes(docs, shingle)
    out = np.full((len(docs), hashes), _EMPTY, dtype=np.uint32)
    if len(values) == 0:
        return out
    present = np.unique(doc)
    starts = np.searchsorted(doc, present)
    for i, s in enumerate(seeds(hashes, seed)):
        mixed = (_mix(values ^ s) >> np.uint64(32)).astype(np.uint32)
        out[present, i] = np.minimum.reduceat(mixed, starts)
    return out


def band_buckets(sig: np.ndarray, bands: int, rows: int) -> np.ndarray:
    """(documents, bands) int64: documents with equal ids in a column agree on that whole band."""
    out = np.empty((len(sig), bands), dtype=np.int64)
    offset = 0
    for b in range(bands):
        block = np.ascontiguousarray(sig[:, b * rows : (b + 1) * rows])
        keys = block.view(np.dtype((np.void, block.dtype.itemsize * rows))).ravel()
        _, inverse = np.unique(keys, return_inverse=True)
        out[:, b] = inverse.ravel() + offset
        offset += len(sig)
    return out


def near_duplicate_keep(sig: np.ndarray, bands: int, rows: int, threshold: float) -> np.ndarray:
    """Bool per document (corpus order): False where an earlier kept document shares a band with
    it and their estimated Jaccard similarity is at least ``threshold``."""
    n = len(sig)
    keep = np.ones(n, dtype=bool)
    if n < 2:
        return keep
    buckets = band_buckets(sig, bands, rows)
    shared = np.zeros(n, dtype=bool)
    for b in range(bands):
        _, inverse, counts = np.unique(buckets[:, b], return_inverse=True, return_counts=True)
        shared |= counts[inverse.ravel()] > 1
    members: dict[int, list[int]] = {}  # bucket -> kept documents in it so far
    for i in np.flatnonzero(shared).tolist():  # one step per document that collides at all
        row = buckets[i].tolist()
        earlier = {k for bucket in row for k in members.get(bucket, ())}
        if earlier:
            others = np.fromiter(sorted(earlier), dtype=np.int64, count=len(earlier))
            if ((sig[others] == sig[i]).mean(axis=1) >= threshold).any():
                keep[i] = False
                continue
        for bucket in row:
            members.setdefault(bucket, []).append(i)
    return keep


@dataclass(frozen=True, slots=True)
class NearDedupe(CleanStep):
    """Marks that near-duplicates are dropped, keeping the first of each group in corpus order.

    ``shingle`` words per shingle (5), ``bands`` x ``rows`` hash functions (16 x 8 = 128),
    ``threshold`` the estimated Jaccard similarity from which a candidate is dropped (0.8),
    ``seed`` for the hash functions (0). With 16 bands of 8 rows, pairs at similarity 0.8
    become candidates with probability 1 - (1 - 0.8**8)**16 = 0.94, pairs at 0.5 with 0.06.
    Like ``dedupe``, ``apply`` returns its input unchanged: the build compares signatures across
    the whole corpus (see the module docstring).
    """

    kind: ClassVar[str] = "near_dedupe"
    is_near_dedupe: ClassVar[bool] = True

    shingle: int = 5
    bands: int = 16
    rows: int = 8
    threshold: float = 0.8
    seed: int = 0

    def __post_init__(self) -> None:
        parse_int("shingle", self.shingle, minimum=1, maximum=64)
        parse_int("bands", self.bands, minimum=1, maximum=512)
        parse_int("rows", self.rows, minimum=1, maximum=64)
        if self.bands * self.rows > 1024:
            raise RecipeError("rows", f"bands * rows must be at most 1024, got {self.bands * self.rows}")
        object.__setattr__(self, "threshold", parse_float("threshold", self.threshold, minimum=0.0, maximum=1.0))
        parse_int("seed", self.seed, minimum=0, maximum=2**63 - 1)

    @property
    def hashes(self) -> int:
        return self.bands * self.rows

    def signatures(self, docs: pa.Array) -> np.ndarray:
        """(documents, bands * rows) uint32 MinHash signatures of ``docs``."""
        return signatures(docs, shingle=self.shingle, hashes=self.hashes, seed=self.seed)

    def apply(self, docs: pa.Array) -> pa.Array:
        """``docs`` unchanged (see the class docstring)."""
        return as_documents(docs)
