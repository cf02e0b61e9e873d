"""N-gram counting and hashing on token-id arrays, with numpy only.

Ids are packed into one ``uint64`` key per n-gram, ``bits`` bits per id, most
significant first, so sorted keys are n-grams in lexicographic id order and a
key's prefix (``key >> bits``) is the key of its (n-1)-gram prefix. Counting is
one ``np.sort`` plus a run-length pass; no Python object per n-gram.

Windows never cross a document: a split's documents are given as content ranges
``[start, start + length)`` of its stream, and anything outside them (begin/end
markers, gaps) breaks windows too.

Reserved key values: with ``bits = key_bits(V)``, ids ``0..V-1`` are tokens, ``V``
is a *virtual begin* id for vocabularies without a begin token, and the all-ones
value ``filler(bits)`` marks "past the end of the document" in a key.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Final

import numpy as np

from seqpipe.errors import SeqpipeError

KEY_BITS: Final = 64
# Multipliers of the window hash are drawn from this fixed seed, so a report is reproducible.
HASH_SEED: Final = 0x5E9B1BE


def key_bits(vocab_size: int) -> int:
    """Bits per id in a packed key: room for ids ``0..V-1``, the virtual begin ``V`` and a filler."""
    return int(vocab_size + 1).bit_length()


def filler(bits: int) -> int:
    """The key value meaning "no token here" (past the end of a document)."""
    return (1 << bits) - 1


def max_order(bits: int) -> int:
    """Longest n-gram that packs into one 64-bit key."""
    return KEY_BITS // bits


def pack(columns: Sequence[np.ndarray], bits: int) -> np.ndarray:
    """One uint64 key per row from ``n`` equally long id columns (first column most significant)."""
    if len(columns) * bits > KEY_BITS:
        raise SeqpipeError(f"cannot pack {len(columns)}-grams of {bits}-bit ids into a 64-bit key; "
                           f"the longest that fits is {max_order(bits)}")
    key = np.asarray(columns[0]).astype(np.uint64)
    shift = np.uint64(bits)
    for col in columns[1:]:
        key = (key << shift) | np.asarray(col).astype(np.uint64)
    return key


def unpack(keys: np.ndarray, n: int, bits: int) -> np.ndarray:
    """Inverse of :func:`pack`: an ``(len(keys), n)`` int64 array of ids."""
    keys = np.asarray(keys, dtype=np.uint64)
    mask = np.uint64(filler(bits))
    out = np.empty((len(keys), n), dtype=np.int64)
    for i in range(n):
        out[:, n - 1 - i] = ((keys >> np.uint64(bits * i)) & mask).astype(np.int64)
    return out


def runs(sorted_keys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct values of a sorted array, their counts, and the index where each run starts."""
    if len(sorted_keys) == 0:
        empty = np.zeros(0, dtype=np.int64)
        return sorted_keys[:0], empty, empty
    flags = np.empty(len(sorted_keys), dtype=bool)
    flags[0] = True
    np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=flags[1:])
    starts = np.flatnonzero(flags)
    counts = np.diff(starts, append=len(sorted_keys))
    return sorted_keys[starts], counts, starts


def positions(sorted_keys: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Index of each query in ``sorted_keys``, or -1 where it is absent.

    The queries are searched in sorted order: numpy's binary search then starts from
    the previous answer and stays in cache, several times faster than random order
    on large tables.
    """
    if len(sorted_keys) == 0 or len(query) == 0:
        return np.full(len(query), -1, dtype=np.int64)
    order = np.argsort(query)
    found = np.minimum(np.searchsorted(sorted_keys, query[order]), len(sorted_keys) - 1)
    found = np.where(sorted_keys[found] == query[order], found, -1)
    out = np.empty(len(query), dtype=np.int64)
    out[order] = found
    return out


def take(values: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """``values[pos]``, with 0 where ``pos`` is -1."""
    values = np.asarray(values)
    if len(values) == 0:
        return np.zeros(len(pos), dtype=values.dtype)
    return np.where(pos >= 0, values[np.maximum(pos, 0)], 0)


def lookup(sorted_keys: np.ndarray, values: np.ndarray, query: np.ndarray) -> np.ndarray:
    """``values`` at the positions of ``query`` in ``sorted_keys``; 0 where a query is absent."""
    return take(values, positions(sorted_keys, query))


@dataclass(frozen=True, slots=True)
class NgramCounts:
    """Distinct n-grams (packed keys, ascending) and how often each occurs."""

    n: int
    bits: int
    keys: np.ndarray  # uint64, sorted, distinct
    counts: np.ndarray  # int64

    @property
    def total(self) -> int:
        """Number of n-gram occurrences."""
        return int(self.counts.sum())

    def __len__(self) -> int:
        return len(self.keys)

    def ids(self) -> np.ndarray:
        """The n-grams as an ``(len, n)`` array of ids."""
        return unpack(self.keys, self.n, self.bits)

    def count_of(self, keys: np.ndarray) -> np.ndarray:
        """Counts of packed ``keys`` (0 for n-grams never seen)."""
        return lookup(self.keys, self.counts, np.asarray(keys, dtype=np.uint64))

    def most_common(self, k: int) -> tuple[np.ndarray, np.ndarray]:
        """The ``k`` most frequent n-grams as ``(ids (k, n), counts)``; ties in id order."""
        # keys are ascending, so a stable sort on descending count breaks ties by key
        order = np.argsort(-self.counts, kind="stable")[:k]
        return unpack(self.keys[order], self.n, self.bits), self.counts[order]


def content_mask(n_tokens: int, starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """True at every stream position inside one of the ranges ``[start, start + length)``."""
    delta = np.zeros(n_tokens + 1, dtype=np.int32)
    np.add.at(delta, starts, 1)
    np.add.at(delta, starts + lengths, -1)
    return np.cumsum(delta[:n_tokens], dtype=np.int32) > 0


def _ranges(n_tokens: int, starts: np.ndarray | None,
            lengths: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    if starts is None or lengths is None:
        return np.zeros(1, np.int64), np.full(1, n_tokens, np.int64)
    return np.asarray(starts, dtype=np.int64), np.asarray(lengths, dtype=np.int64)


def window_keys(ids: np.ndarray, n: int, *, bits: int, starts: np.ndarray | None = None,
                lengths: np.ndarray | None = None) -> np.ndarray:
    """One packed key per content position ``j``: the window ``ids[j:j+n]`` of its document,
    with the slots past the document's end set to the filler (in stream order)."""
    x = np.asarray(ids)
    fill = filler(bits)
    if len(x) and int(x.max()) >= fill:
        raise SeqpipeError(f"id {int(x.max())} does not fit a {bits}-bit key slot")
    if n * bits > KEY_BITS:
        raise SeqpipeError(f"cannot pack {n}-grams of {bits}-bit ids into a 64-bit key; "
                           f"the longest that fits is {max_order(bits)}")
    starts_, lengths_ = _ranges(len(x), starts, lengths)
    content = x[content_mask(len(x), starts_, lengths_)].astype(np.uint64)
    total = len(content)
    shift = np.uint64(bits)
    key = content.copy()
    for i in range(1, n):  # in place: no 8-byte temporaries per token
        cut = max(total - i, 0)
        np.left_shift(key[:cut], shift, out=key[:cut])
        np.bitwise_or(key[:cut], content[i:], out=key[:cut])
        key[cut:] <<= shift
    # the last i positions of a document looked i slots into the next one: fill those slots
    ends = np.cumsum(lengths_)
    for i in range(1, n):
        key[(ends - i)[lengths_ >= i]] |= np.uint64(filler(bits * (n - i)))
    out: np.ndarray = key
    return out


def count_ngrams(ids: np.ndarray, orders: Sequence[int], *, bits: int,
                 starts: np.ndarray | None = None,
                 lengths: np.ndarray | None = None) -> dict[int, NgramCounts]:
    """Count n-grams of every order in ``orders`` inside the documents, with one sort.

    ``starts``/``lengths`` are the documents' content ranges in ``ids``, in stream order
    and not overlapping (default: the whole array is one document). Every content position gives one key of the largest
    order (:func:`window_keys`); one sort and a run-length pass count them; each lower
    order k comes from the distinct keys' k-slot prefixes (sorted, since a shift keeps
    order), which count iff their last slot holds a real id.
    """
    if not orders or min(orders) < 1:
        raise SeqpipeError(f"n-gram orders must be positive, got {list(orders)}")
    n = max(orders)
    key = window_keys(ids, n, bits=bits, starts=starts, lengths=lengths)
    key.sort()  # one in-place sort: on this class of machine, faster than splitting it over threads
    top, top_counts, _ = runs(key)
    slot = np.uint64(filler(bits))
    out: dict[int, NgramCounts] = {}
    for k in sorted(set(orders)):
        prefix = top >> np.uint64(bits * (n - k))
        real = (prefix & slot) != slot
        uniq, _, first = runs(prefix[real])
        counts = np.add.reduceat(top_counts[real], first) if len(uniq) else first
        out[k] = NgramCounts(n=k, bits=bits, keys=uniq, counts=counts.astype(np.int64))
    return out


def hash_multipliers(n: int, seed: int = HASH_SEED) -> np.ndarray:
    """The ``n`` uniform random 64-bit multipliers of the window hash."""
    rng = np.random.default_rng(seed)
    return rng.integers(0, np.iinfo(np.uint64).max, size=n, dtype=np.uint64, endpoint=True)


def window_hashes(ids: np.ndarray, n: int, *, starts: np.ndarray | None = None,
                  lengths: np.ndarray | None = None, seed: int = HASH_SEED) -> np.ndarray:
    """A 64-bit hash of every length-``n`` window that lies inside one document.

    Multilinear hashing: ``h(x) = sum_i m_i * x_i mod 2**64`` with uniform random
    ``m_i``; ``n`` vectorized multiply-adds over shifted views, no per-window call.
    Chosen over a rolling polynomial hash mod 2**64, whose collisions have no useful
    bound (and known bad inputs), and over xxhash per window, which costs a Python
    call per token. Collision rate (from the definition): for windows x != y pick a
    slot i where d = x_i - y_i has the fewest trailing zero bits, v; for any fixed
    other multipliers, m_i * d hits each multiple of 2**v exactly 2**v times as m_i
    runs over all 2**64 values, so P[h(x) = h(y)] <= 2**(v - 64), and v < b for ids
    below 2**b. For ids below 2**15 that is <= 2**-50 per pair: 2e7 distinct train
    windows give an expected < 2e-8 false matches per checked window. The seed is
    fixed (reports are reproducible); the bound assumes data not chosen against it.
    """
    starts_, lengths_ = _ranges(len(ids), starts, lengths)
    x = np.asarray(ids)[content_mask(len(ids), starts_, lengths_)].astype(np.uint64)
    total = len(x)
    if total < n:
        return np.zeros(0, dtype=np.uint64)
    mult = hash_multipliers(n, seed)
    width = total - n + 1
    h = x[:width] * mult[0]
    term = np.empty_like(h)
    for i in range(1, n):
        np.multiply(x[i:i + width], mult[i], out=term)
        h += term  # wraps mod 2**64 by design
    # a window starting in the last n-1 positions of a document runs into the next one
    inside = np.ones(total, dtype=bool)
    ends = np.cumsum(lengths_)
    for i in range(1, n):
        inside[(ends - i)[lengths_ >= i]] = False
    out: np.ndarray = h[inside[:width]]
    return out
