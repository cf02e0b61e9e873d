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

Signatures are computed in the ingest tasks (numpy over the batch: word hashes come from prefix
sums over the batch's bytes, shingles combine word hashes, and each hash function is a
multiply-add over a block of shingles; no Python call per word); only the comparison of colliding
documents runs in the driver, one Python step per such document.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_float, parse_int
from seqpipe.clean._quality import SPACE_RUNS, byte_runs, code_points, in_runs, mix64, utf8_buffers
from seqpipe.clean.base import CleanStep, as_documents
from seqpipe.errors import RecipeError

_GOLDEN: Final = np.uint64(0x9E3779B97F4A7C15)  # the splitmix64 increment (Steele, Lea and Flood 2014)
_OFFSET_SEED: Final = 0x5EED_0FF5E7  # the offsets b_i come from another seed than the multipliers a_i
_BYTE_BASE: Final = np.uint32(0x01000193)  # an odd multiplier for the byte polynomial (FNV's 32-bit prime)
_EMPTY: Final = np.uint32(0xFFFFFFFF)


def fmix32(x: np.ndarray) -> np.ndarray:
    """The 32-bit finalizer of MurmurHash3 (Appleby; public domain) applied to every uint32 of
    ``x``: a bijection that spreads every input bit over the output."""
    with np.errstate(over="ignore"):
        x = x ^ (x >> np.uint32(16))
        x *= np.uint32(0x85EBCA6B)
        x ^= x >> np.uint32(13)
        x *= np.uint32(0xC2B2AE35)
        x ^= x >> np.uint32(16)
    return x


def _byte_hashes(text: pa.Array) -> np.ndarray:
    """A 32-bit hash of each value's UTF-8 bytes (:func:`_span_hashes`)."""
    data, offsets = utf8_buffers(text)
    return _span_hashes(data, offsets[:-1], offsets[1:])


def _span_hashes(data: np.ndarray, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """A 32-bit hash of the bytes b_0 .. b_{n-1} of each span ``data[start:end]`` (spans in
    order, not overlapping): the polynomial sum(b_j * B**(j + 1)) mod 2**32 plus n, mixed (spans
    of equal length that differ in a byte differ in the polynomial's value; the length tells the
    others apart).

    Taken from prefix sums over the buffer: a span's polynomial is the difference of two prefix
    sums divided by B**start, a multiplication by the inverse of B mod 2**32 (B is odd), so no
    pass per span or per distinct span is needed. 32-bit lanes: the shingles these words make are
    told apart by 32 bits in the end (:func:`k_functions`), and vector units multiply and add
    twice as many of them per instruction as 64-bit ones.
    """
    n = len(starts)
    out = np.zeros(n, np.uint32)
    # spans of about _SPAN bytes at a time: the powers kept stay that long
    cuts = np.unique(np.r_[0, np.searchsorted(starts, np.arange(0, int(ends[-1]) if n else 0, _SPAN)), n])
    for lo, hi in zip(cuts[:-1].tolist(), cuts[1:].tolist(), strict=True):
        base = int(starts[lo])
        part = data[base : int(ends[hi - 1])]
        prefix = np.empty(len(part) + 1, np.uint32)
        prefix[0] = 0
        powers, inverse = _powers(len(part))
        with np.errstate(over="ignore"):
            np.multiply(part, powers[1 : len(part) + 1], out=prefix[1:])
            np.cumsum(prefix[1:], out=prefix[1:])
            a = starts[lo:hi] - base
            out[lo:hi] = (prefix[ends[lo:hi] - base] - prefix[a]) * inverse[a]
    return fmix32(out + (ends - starts).astype(np.uint32))


_SPAN: Final = 1 << 18
_BYTE_INVERSE: Final = np.uint32(pow(int(_BYTE_BASE), -1, 2**32))


@dataclass(frozen=True, slots=True)
class _Powers:
    """B**j and B**-j mod 2**32 for j up to some length: computed once per process and shared by
    its threads (read only)."""

    powers: np.ndarray
    inverse: np.ndarray

    @classmethod
    def of_length(cls, size: int) -> _Powers:
        with np.errstate(over="ignore"):
            powers = np.cumprod(np.r_[np.uint32(1), np.full(size - 1, _BYTE_BASE, np.uint32)], dtype=np.uint32)
            inverse = np.cumprod(np.r_[np.uint32(1), np.full(size - 1, _BYTE_INVERSE, np.uint32)], dtype=np.uint32)
        return cls(powers, inverse)


_KEPT_POWERS: list[_Powers] = []  # the longest table so far; replaced whole, never changed in place
_POWERS_LOCK: Final = threading.Lock()


def _powers(count: int) -> tuple[np.ndarray, np.ndarray]:
    """B**j and B**-j mod 2**32 for j in 0 .. count (at least: longer arrays are reused; as
    slices are at most _SPAN bytes but for one longer value, these stay about _SPAN long)."""
    kept = _KEPT_POWERS[-1] if _KEPT_POWERS else None
    if kept is None or len(kept.powers) <= count:
        with _POWERS_LOCK:
            kept = _KEPT_POWERS[-1] if _KEPT_POWERS else None
            if kept is None or len(kept.powers) <= count:
                kept = _Powers.of_length(max(count + 1, _SPAN + 1))
                _KEPT_POWERS[:] = [kept]
    return kept.powers, kept.inverse


@dataclass(frozen=True, slots=True)
class _WideSpaces:
    """The whitespace code points beyond ASCII, as pyarrow's ``utf8_is_space`` sees them, and
    the runs of the UTF-8 first bytes that start one."""

    code_points: np.ndarray  # sorted
    lead_runs: tuple[tuple[int, int], ...]


# Code points beyond ASCII that pyarrow is asked about: Unicode's White_Space property
# (PropList.txt: U+0085, U+00A0, U+1680, U+2000..U+200A, U+2028, U+2029, U+202F, U+205F,
# U+3000) and three that some versions counted (U+180E, U+200B, U+FEFF). A test checks that
# pyarrow finds no other whitespace in the whole of Unicode, so asking about these 24 (once per
# process) gives the set a scan of every code point would.
_WIDE_SPACE_CANDIDATES: Final = (
    0x85,
    0xA0,
    0x1680,
    0x180E,
    *range(0x2000, 0x200C),
    0x2028,
    0x2029,
    0x202F,
    0x205F,
    0x3000,
    0xFEFF,
)
_WIDE_SPACES: list[_WideSpaces] = []


def _wide_spaces() -> _WideSpaces:
    if not _WIDE_SPACES:  # a race computes it twice, with the same result
        cps = np.array(_WIDE_SPACE_CANDIDATES, dtype=np.int64)
        chars = pa.array([chr(c) for c in cps.tolist()], pa.large_string())
        found = cps[np.asarray(pc.utf8_is_space(chars).to_numpy(zero_copy_only=False), dtype=bool)]
        leads = np.zeros(256, dtype=bool)
        leads[[chr(c).encode("utf-8")[0] for c in found.tolist()]] = True
        _WIDE_SPACES.append(_WideSpaces(np.sort(found), byte_runs(leads)))
    return _WIDE_SPACES[0]


def _space_bytes(data: np.ndarray) -> np.ndarray:
    """``_quality.space_bytes`` (per byte of a batch's UTF-8 ``data``: part of a whitespace code
    point, as pyarrow's ``utf8_is_space`` sees it), with a compare per run of byte values instead
    of a table look-up per byte: the single-byte whitespace directly, and beyond ASCII only the
    code points whose first byte can start a whitespace one are decoded and looked up."""
    space = in_runs(data, SPACE_RUNS)
    wide = _wide_spaces()
    at = np.flatnonzero(in_runs(data, wide.lead_runs))
    if len(at):
        at = at[np.isin(code_points(data, at), wide.code_points)]
        size = np.where(data[at] >= 0xE0, 3, 2)  # whitespace code points take two or three bytes
        for k in range(3):
            space[at[size > k] + k] = True
    return space


def _word_hashes(docs: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A 32-bit hash of each word's UTF-8 bytes (:func:`_span_hashes`) and the document of each
    word. Words are the runs of bytes outside Unicode whitespace within a document, as
    ``_quality.words`` cuts them; found here over the bytes in place (no word array is built)."""
    data, offsets = utf8_buffers(docs)
    if not len(data):
        return np.zeros(0, np.uint32), np.zeros(0, np.int64)
    inside = ~_space_bytes(data)
    start = np.empty_like(inside)  # inside after outside (for booleans a > b is a and not b)
    np.greater(inside[1:], inside[:-1], out=start[1:])
    start[0] = inside[0]
    end = np.empty_like(inside)  # inside before outside
    np.greater(inside[:-1], inside[1:], out=end[:-1])
    end[-1] = inside[-1]
    filled = offsets[:-1] < offsets[1:]
    first, last = offsets[:-1][filled], offsets[1:][filled] - 1  # a word never spans two documents
    start[first] = inside[first]
    end[last] = inside[last]
    starts = np.flatnonzero(start)
    # each document's words are a run of starts: the document of a word from the counts per document
    counts = np.diff(np.searchsorted(starts, offsets))
    doc = np.repeat(np.arange(len(offsets) - 1), counts)
    return _span_hashes(data, starts, np.flatnonzero(end) + 1), doc


def _shingle_hashes(docs: pa.Array, size: int) -> tuple[np.ndarray, np.ndarray]:
    """A 32-bit hash per shingle (``size`` consecutive words of one document; Horner over their
    word hashes, mixed by :func:`fmix32`) and its document.
    A document with fewer words has one shingle of all its words; one without words has none."""
    word, doc = _word_hashes(docs)
    n = len(word)
    if n == 0:
        return word, doc
    first = np.ones(n, dtype=bool)
    first[1:] = doc[1:] != doc[:-1]
    run_start = np.flatnonzero(first)
    run_len = np.diff(np.append(run_start, n))
    # a shingle starts at every word but a document's last size - 1 (its first word always starts one)
    valid = np.ones(n, dtype=bool)
    run_end = run_start + run_len
    for k in range(1, size):  # a loop over shingle positions, not over words
        valid[run_end[run_len > k] - k] = False
    starts = np.flatnonzero(valid)
    padded = np.r_[word, np.zeros(size, np.uint32)]  # the windows of a document's last words read past its end
    with np.errstate(over="ignore"):
        window = padded[:n].copy()  # Horner over every window of size words (slices, not gathers)
        for k in range(1, size):
            window *= _BYTE_BASE
            window += padded[k : n + k]
        acc = window[starts]
        width = np.full(len(starts), size, np.uint32)
        short = np.flatnonzero(run_len < size)
        if len(short):  # documents with fewer words than a shingle: Horner over their words only
            at = np.searchsorted(starts, run_start[short])
            part = np.zeros(len(short), np.uint32)
            for k in range(size):
                part = np.where(k < run_len[short], part * _BYTE_BASE + padded[run_start[short] + k], part)
            acc[at] = part
            width[at] = run_len[short]
    return fmix32(acc + width), doc[starts]


def seeds(count: int, seed: int) -> np.ndarray:
    """``count`` 64-bit seeds, one per hash function, from the step's ``seed``."""
    with np.errstate(over="ignore"):
        base = np.uint64(seed) * _GOLDEN + np.arange(1, count + 1, dtype=np.uint64) * _GOLDEN
    return mix64(base)


def signatures(docs: pa.Array, *, shingle: int, hashes: int, seed: int) -> np.ndarray:
    """(documents, hashes) uint32 MinHash signatures; a document without words gets all 0xFFFFFFFF
    (:func:`k_functions` over the documents' shingle hashes)."""
    docs = as_documents(docs)
    values, doc = _shingle_hashes(docs, shingle)
    return k_functions(values, doc, len(docs), hashes, seed)


def k_functions(values: np.ndarray, doc: np.ndarray, documents: int, hashes: int, seed: int) -> np.ndarray:
    """Signatures from ``hashes`` seeded hash functions, the minimum of each over a document's
    shingle hashes ``values`` (``doc``: each one's document, non-decreasing).

    Hash function i maps a shingle's 32-bit hash x (already mixed) to ``a_i * x + b_i`` mod
    2**32 (``a_i`` odd, both the low 32 bits of seeds): a multiply-add permutation of the 32-bit
    values, in 32-bit lanes, which vector units multiply at twice the width (and without the
    three-product emulation) of 64-bit ones. Two array passes per hash function over
    the batch's shingles plus one minimum per document, a block of shingles at a time.
    """
    out = np.full((documents, hashes), _EMPTY, dtype=np.uint32)
    if len(values) == 0:
        return out
    first = np.flatnonzero(np.r_[True, doc[1:] != doc[:-1]])  # each present document's first shingle
    multipliers = (seeds(hashes, seed).astype(np.uint32) | np.uint32(1))[:, None]
    offsets = seeds(hashes, seed ^ _OFFSET_SEED).astype(np.uint32)[:, None]
    lowest = np.full((hashes, len(first)), _EMPTY, dtype=np.uint32)
    # blocks of _BLOCK shingles: every hash function over one block at a time keeps the
    # (hashes, block) products in one reused buffer whatever the documents' lengths; a document
    # that spans blocks takes the minimum of its pieces
    buffer = np.empty((hashes, min(_BLOCK, len(values))), np.uint32)
    with np.errstate(over="ignore"):
        for a in range(0, len(values), _BLOCK):
            b = min(a + _BLOCK, len(values))
            lo = int(np.searchsorted(first, a, side="right")) - 1  # the document holding shingle a
            hi = int(np.searchsorted(first, b, side="left"))  # and every document starting before b
            mixed = buffer[:, : b - a]
            np.multiply(multipliers, values[a:b], out=mixed)
            mixed += offsets
            piece = np.minimum.reduceat(mixed, np.maximum(first[lo:hi] - a, 0), axis=1)
            np.minimum(lowest[:, lo:hi], piece, out=lowest[:, lo:hi])
    out[doc[first]] = lowest.T
    return out


_BLOCK: Final = 1 << 13


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

    ``shingle`` words per shingle (5), ``bands`` x ``rows`` hash functions (14 x 7 = 98),
    ``threshold`` the estimated Jaccard similarity from which a candidate is dropped (0.8),
    ``seed`` for the hash functions (0). With 14 bands of 7 rows, pairs at similarity 0.8
    become candidates with probability 1 - (1 - 0.8**7)**14 = 0.963, pairs at 0.5 with 0.10.
    Like ``dedupe``, ``apply`` returns its input unchanged: the build compares signatures across
    the whole corpus (see the module docstring).
    """

    kind: ClassVar[str] = "near_dedupe"
    is_near_dedupe: ClassVar[bool] = True

    shingle: int = 5
    bands: int = 14
    rows: int = 7
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
