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

Signatures are computed in the ingest tasks (numpy over the batch: each distinct word's bytes
are hashed once, shingles combine word hashes, and each hash function is a multiply-add over all
shingles; no Python call per word); only the comparison of colliding documents runs in the
driver, one Python step per such document.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa

from seqpipe._parse import parse_float, parse_int
from seqpipe.clean._quality import mix64, utf8_buffers, words
from seqpipe.clean.base import CleanStep, as_documents
from seqpipe.errors import RecipeError

_GOLDEN: Final = np.uint64(0x9E3779B97F4A7C15)  # the splitmix64 increment (Steele, Lea and Flood 2014)
_OFFSET_SEED: Final = 0x5EED_0FF5E7  # the offsets b_i come from another seed than the multipliers a_i
_BYTE_BASE: Final = np.uint64(0x100000001B3)  # an odd multiplier for the byte polynomial (FNV's prime)
_EMPTY: Final = np.uint32(0xFFFFFFFF)


def _byte_hashes(text: pa.Array) -> np.ndarray:
    """A 64-bit hash of each value's UTF-8 bytes (a polynomial over the bytes, then mixed)."""
    n = len(text)
    data, offsets = utf8_buffers(text)
    if n == 0:
        return np.zeros(0, np.uint64)
    data = data.astype(np.uint64)
    starts = offsets[:-1]
    lengths = np.diff(offsets)
    position = np.arange(len(data), dtype=np.int64) - np.repeat(starts, lengths)
    powers = (
        np.cumprod(np.full(int(lengths.max()), _BYTE_BASE, dtype=np.uint64)) if len(data) else np.ones(1, np.uint64)
    )
    with np.errstate(over="ignore"):
        terms = (data + np.uint64(1)) * powers[position]
        sums = np.zeros(n, np.uint64)
        filled = lengths > 0
        if len(data):
            sums[filled] = np.add.reduceat(terms, starts[filled])
    return mix64(sums + lengths.astype(np.uint64))


def _word_hashes(docs: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A 64-bit hash of each word's UTF-8 bytes and the document of each word: each distinct
    word of the batch is hashed once (numpy over its bytes), then looked up per word."""
    pieces = words(docs)
    if len(pieces.text) == 0:
        return np.zeros(0, np.uint64), pieces.doc
    distinct, codes = pieces.encoded()
    return _byte_hashes(distinct)[codes], pieces.doc


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
            acc = np.where(inside, acc * _BYTE_BASE + value, acc)
    return mix64(acc + width.astype(np.uint64)), doc[starts]


def seeds(count: int, seed: int) -> np.ndarray:
    """``count`` 64-bit seeds, one per hash function, from the step's ``seed``."""
    with np.errstate(over="ignore"):
        base = np.uint64(seed) * _GOLDEN + np.arange(1, count + 1, dtype=np.uint64) * _GOLDEN
    return mix64(base)


def signatures(docs: pa.Array, *, shingle: int, hashes: int, seed: int) -> np.ndarray:
    """(documents, hashes) uint32 MinHash signatures; a document without words gets all 0xFFFFFFFF.

    Hash function i maps a shingle's 64-bit hash x to the top 32 bits of ``a_i * x + b_i``
    (mod 2**64; ``a_i`` odd, both from the seed): multiply-add-shift hashing (Dietzfelbinger,
    Hagerup, Katajainen and Penttonen 1997, "A reliable randomized algorithm for the
    closest-pair problem"). The top bits are a non-decreasing function of the 64-bit value, so
    the minimum is taken over the 64-bit values and shifted once per document: two array passes
    per hash function over the batch's shingles.
    """
    docs = as_documents(docs)
    values, doc = _shingle_hashes(docs, shingle)
    out = np.full((len(docs), hashes), _EMPTY, dtype=np.uint32)
    if len(values) == 0:
        return out
    present = np.unique(doc)
    starts = np.searchsorted(doc, present)
    multipliers = seeds(hashes, seed) | np.uint64(1)
    offsets = seeds(hashes, seed ^ _OFFSET_SEED)
    mixed = np.empty_like(values)
    lowest = np.empty((hashes, len(present)), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for i in range(hashes):
            np.multiply(values, multipliers[i], out=mixed)
            np.add(mixed, offsets[i], out=mixed)
            np.minimum.reduceat(mixed, starts, out=lowest[i])
    out[present] = (lowest >> np.uint64(32)).astype(np.uint32).T
    return out


def band_buckets(sig: np.ndarray, bands: int, rows: int) -> np.ndarray:
    """(documents, bands) int64: documents with equal ids in a column agree on that whole band.

    Each band's ``rows`` values are folded into one 64-bit key (one sort of integers per band,
    not of byte strings); every document is then checked to equal the first document of its
    key, and a band where two different rows share a key is grouped by its rows instead.
    """
    out = np.empty((len(sig), bands), dtype=np.int64)
    offset = 0
    for b in range(bands):
        block = np.ascontiguousarray(sig[:, b * rows : (b + 1) * rows])
        key = np.zeros(len(sig), dtype=np.uint64)
        with np.errstate(over="ignore"):
            for r in range(rows):
                key = key * _GOLDEN + block[:, r].astype(np.uint64)
        _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
        inverse = inverse.ravel()
        if not np.array_equal(block, block[first[inverse]]):  # a key shared by different rows
            keys = block.view(np.dtype((np.void, block.dtype.itemsize * rows))).ravel()
            _, inverse = np.unique(keys, return_inverse=True)
            inverse = inverse.ravel()
        out[:, b] = inverse + offset
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
