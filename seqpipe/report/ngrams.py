"""N-gram counting and hashing on token-id arrays, with numpy only.

Ids are packed into one ``uint64`` key per n-gram, ``bits`` bits per id, most
significant first, so sorted keys are n-grams in lexicographic id order and a
key's prefix (``key >> bits``) is the key of its (n-1)-gram prefix. Counting is
sorts of key ranges plus run-length passes; no Python object per n-gram.

Windows never cross a document: a split's documents are given as content ranges
``[start, start + length)`` of its stream, and anything outside them (begin/end
markers, gaps) breaks windows too.

Reserved key values: with ``bits = key_bits(V)``, ids ``0..V-1`` are tokens, ``V``
is a *virtual begin* id for vocabularies without a begin token, and the all-ones
value ``filler(bits)`` marks "past the end of the document" in a key.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Final

import numpy as np

from seqpipe.errors import SeqpipeError
from seqpipe.executors import default_workers

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
        raise SeqpipeError(
            f"cannot pack {len(columns)}-grams of {bits}-bit ids into a 64-bit key; "
            f"the longest that fits is {max_order(bits)}"
        )
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


def distinct_sorted(sorted_keys: np.ndarray) -> np.ndarray:
    """Distinct values of a sorted array (:func:`runs` without the counts and starts it allocates)."""
    if len(sorted_keys) == 0:
        return sorted_keys[:0]
    flags = np.empty(len(sorted_keys), dtype=bool)
    flags[0] = True
    np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=flags[1:])
    out: np.ndarray = sorted_keys[flags]
    return out


def positions(sorted_keys: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Index of each query in ``sorted_keys``, or -1 where it is absent.

    The queries are searched in sorted order: numpy's binary search then starts from
    the previous answer and stays in cache, which random order on a large table does not.
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


def merge_counts(
    keys: np.ndarray, counts: np.ndarray, more: np.ndarray, more_counts: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Two sets of distinct sorted keys with counts, as one (counts of shared keys added).

    A merge by binary search: the keys of ``more`` that are new are inserted, the others add their
    counts in place, so the only temporaries at the size of ``keys`` are the two results (a sort of
    the joined keys would need several)."""
    if len(keys) == 0:
        return more, more_counts
    pos = np.searchsorted(keys, more)
    found = pos < len(keys)
    found[found] = keys[pos[found]] == more[found]
    new = ~found
    # a found key moves right by the number of new keys inserted before it (all smaller: more is sorted)
    shift: np.ndarray = np.cumsum(new) - new
    merged_counts = np.insert(counts, pos[new], more_counts[new])
    merged_counts[pos[found] + shift[found]] += more_counts[found]
    return np.insert(keys, pos[new], more[new]), merged_counts


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


def _ranges(n_tokens: int, starts: np.ndarray | None, lengths: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    if starts is None or lengths is None:
        return np.zeros(1, np.int64), np.full(1, n_tokens, np.int64)
    return np.asarray(starts, dtype=np.int64), np.asarray(lengths, dtype=np.int64)


def _content(ids: np.ndarray, starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """The documents' ids back to back (a view when the ranges leave no gaps)."""
    if len(starts) == 0:
        return ids[:0]
    first, stop = int(starts[0]), int(starts[-1] + lengths[-1])
    out: np.ndarray
    if int(lengths.sum()) == stop - first and bool((starts[1:] == (starts + lengths)[:-1]).all()):
        out = ids[first:stop]
    else:
        out = ids[content_mask(len(ids), starts, lengths)]
    return out


@dataclass(frozen=True, slots=True)
class _Windows:
    """Every content position's window of ``n`` ids, built in pieces on demand."""

    content: np.ndarray  # the documents' ids back to back
    marks: tuple[np.ndarray, ...]  # marks[i - 1]: positions whose last n - i slots are past their document
    n: int
    bits: int

    @classmethod
    def of(
        cls, ids: np.ndarray, n: int, *, bits: int, starts: np.ndarray | None, lengths: np.ndarray | None
    ) -> _Windows:
        x = np.asarray(ids)
        if x.dtype.kind == "i":  # signed ids: the same bits as unsigned once known non-negative
            if len(x) and int(x.min()) < 0:
                raise SeqpipeError(f"negative id {int(x.min())}")
            x = x.view(x.dtype.str.replace("i", "u"))
        fill = filler(bits)
        if len(x) and int(x.max()) >= fill:
            raise SeqpipeError(f"id {int(x.max())} does not fit a {bits}-bit key slot")
        if n * bits > KEY_BITS:
            raise SeqpipeError(
                f"cannot pack {n}-grams of {bits}-bit ids into a 64-bit key; the longest that fits is {max_order(bits)}"
            )
        starts_, lengths_ = _ranges(len(x), starts, lengths)
        ends = np.cumsum(lengths_)
        # the last i positions of a document would look i slots into the next one
        marks = tuple((ends - i)[lengths_ >= i] for i in range(1, n))
        return cls(content=_content(x, starts_, lengths_), marks=marks, n=n, bits=bits)

    def __len__(self) -> int:
        return len(self.content)

    def keys(self, lo: int, hi: int) -> np.ndarray:
        """Packed keys of the windows at content positions ``lo .. hi - 1``, in order."""
        x = self.content[lo : min(hi + self.n - 1, len(self.content))]
        m = hi - lo
        shift = np.uint64(self.bits)
        key = x[:m].astype(np.uint64)
        for i in range(1, self.n):  # in place: no 8-byte temporaries per token
            cut = max(min(m, len(x) - i), 0)
            np.left_shift(key[:cut], shift, out=key[:cut])
            np.bitwise_or(key[:cut], x[i : i + cut], out=key[:cut])
            key[cut:] <<= shift
        for i, mark in enumerate(self.marks, start=1):
            a, b = np.searchsorted(mark, (lo, hi))
            key[mark[a:b] - lo] |= np.uint64(filler(self.bits * (self.n - i)))
        return key


def window_keys(
    ids: np.ndarray, n: int, *, bits: int, starts: np.ndarray | None = None, lengths: np.ndarray | None = None
) -> np.ndarray:
    """One packed key per content position ``j``: the window ``ids[j:j+n]`` of its document,
    with the slots past the document's end set to the filler (in stream order)."""
    windows = _Windows.of(ids, n, bits=bits, starts=starts, lengths=lengths)
    return windows.keys(0, len(windows))


# Counting splits the windows twice. By position into pieces of CHUNK_WINDOWS, whose keys
# are made and spread over BUCKETS ranges of their first id (equal shares of the
# windows); then each range is sorted and counted, every order, on its own: about 1.2M
# keys here, which sort faster per key than one 20M-key sort, on all cores (np.sort drops
# the GIL), and the ranges' tables join end to end with no merge.
CHUNK_WINDOWS: Final = 1 << 21
BUCKETS: Final = 16


def _bucket_table(content: np.ndarray) -> np.ndarray:
    """Id -> bucket, non-decreasing in the id, giving each of BUCKETS about an equal share of the windows."""
    freq = np.bincount(content if content.dtype.itemsize < 8 else content.astype(np.int64))
    before = np.cumsum(freq) - freq
    table: np.ndarray = np.minimum(before * BUCKETS // max(len(content), 1), BUCKETS - 1).astype(np.uint8)
    return table


def _spread(windows: _Windows, lo: int, hi: int, table: np.ndarray) -> list[np.ndarray]:
    """The keys of windows ``lo .. hi - 1``, one array per bucket of their first id."""
    key = windows.keys(lo, hi)
    bucket = np.take(table, windows.content[lo:hi])
    order = np.argsort(bucket, kind="stable")  # a radix sort for 1-byte values
    edges = np.searchsorted(bucket[order], np.arange(BUCKETS + 1))
    key = key[order]
    return [key[a:b] for a, b in itertools.pairwise(edges.tolist())]


def _orders_of(
    keys: list[np.ndarray], orders: tuple[int, ...], n: int, bits: int
) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """Sorted distinct n-grams and counts of every order, from windows' keys of the top order ``n``.

    Each lower order k comes from the distinct keys' k-slot prefixes (sorted, since a
    shift keeps order), which count iff their last slot holds a real id.
    """
    key = np.concatenate(keys) if len(keys) != 1 else keys[0]  # ours to sort in place: no copy
    key.sort()
    top, top_counts, _ = runs(key)
    del key
    slot = np.uint64(filler(bits))
    out: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    for k in orders:
        prefix = top >> np.uint64(bits * (n - k))
        real = (prefix & slot) != slot
        if k == n:  # distinct already
            out[k] = top[real], top_counts[real]
            continue
        uniq, _, first = runs(prefix[real])
        out[k] = uniq, (np.add.reduceat(top_counts[real], first) if len(uniq) else first)
    return out


def count_ngrams(
    ids: np.ndarray,
    orders: Sequence[int],
    *,
    bits: int,
    starts: np.ndarray | None = None,
    lengths: np.ndarray | None = None,
    threads: int | None = None,
    chunk: int = CHUNK_WINDOWS,
) -> dict[int, NgramCounts]:
    """Count n-grams of every order in ``orders`` inside the documents.

    ``starts``/``lengths`` are the documents' content ranges in ``ids``, in stream order
    and not overlapping (default: the whole array is one document). Every content position
    gives one key of the largest order. The keys are counted in ranges of their first id
    (see ``CHUNK_WINDOWS``) on ``threads`` threads (default: the usable cores); the
    ranges' n-grams of every order are disjoint and ascending from range to range, so
    they join end to end. The result does not depend on ``threads`` or ``chunk``.
    """
    if not orders or min(orders) < 1:
        raise SeqpipeError(f"n-gram orders must be positive, got {list(orders)}")
    if chunk < 1:
        raise SeqpipeError(f"chunk must be at least 1 window, got {chunk}")
    wanted = tuple(sorted(set(orders)))
    n = wanted[-1]
    windows = _Windows.of(ids, n, bits=bits, starts=starts, lengths=lengths)
    total = len(windows)
    if total <= chunk:
        parts = [_orders_of([windows.keys(0, total)], wanted, n, bits)]
    else:
        table = _bucket_table(windows.content)
        bounds = [(lo, min(lo + chunk, total)) for lo in range(0, total, chunk)]
        with ThreadPoolExecutor(max_workers=threads or default_workers()) as pool:
            pieces = list(pool.map(lambda b: _spread(windows, b[0], b[1], table), bounds))
            by_bucket = [[p[j] for p in pieces] for j in range(BUCKETS)]
            del pieces
            parts = list(pool.map(lambda keys: _orders_of(keys, wanted, n, bits), by_bucket))
    return {
        k: NgramCounts(
            n=k,
            bits=bits,
            keys=np.concatenate([p[k][0] for p in parts]),
            counts=np.concatenate([p[k][1] for p in parts]).astype(np.int64),
        )
        for k in wanted
    }


def hash_multipliers(n: int, seed: int = HASH_SEED) -> np.ndarray:
    """The ``n`` uniform random 64-bit multipliers of the window hash."""
    rng = np.random.default_rng(seed)
    return rng.integers(0, np.iinfo(np.uint64).max, size=n, dtype=np.uint64, endpoint=True)


def window_hashes(
    ids: np.ndarray,
    n: int,
    *,
    starts: np.ndarray | None = None,
    lengths: np.ndarray | None = None,
    seed: int = HASH_SEED,
) -> np.ndarray:
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
    x = _content(np.asarray(ids), starts_, lengths_).astype(np.uint64)
    total = len(x)
    if total < n:
        return np.zeros(0, dtype=np.uint64)
    mult = hash_multipliers(n, seed)
    width = total - n + 1
    h = x[:width] * mult[0]
    term = np.empty_like(h)
    for i in range(1, n):
        np.multiply(x[i : i + width], mult[i], out=term)
        h += term  # wraps mod 2**64 by design
    # a window starting in the last n-1 positions of a document runs into the next one
    inside = np.ones(total, dtype=bool)
    ends = np.cumsum(lengths_)
    for i in range(1, n):
        inside[(ends - i)[lengths_ >= i]] = False
    out: np.ndarray = h[inside[:width]]
    return out
