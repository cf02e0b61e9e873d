"""Byte-pair encoding: learning merges, and applying them to one chunk.

The learning rule is the one of Sennrich, Haddow & Birch (ACL 2016), section
3.2: repeatedly replace the most frequent adjacent symbol pair by a new symbol.
Symbols are integer ids and every merge makes a new id. (The paper's version
names symbols by their strings; the two agree as long as no merge spells an
existing token a second way, which greedy left-to-right merging has not done in
any corpus we tried; the tests compare against a string-based trainer.)

Each distinct chunk is stored once with its frequency. Pair counts and, per
pair, the set of chunks holding it, are kept up to date after each merge by
revisiting only the chunks that held the merged pair. The next pair comes from
a heap with lazy invalidation: every pair always has an entry whose key is at
most its true key ``(-count, first chunk, first position)``; a popped entry
whose key is out of date is pushed back with the true key, so the entry that
survives a pop is the true best pair.
"""

from __future__ import annotations

import heapq
import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from seqpipe.errors import TokenizerError

Pair = tuple[int, int]


def merge_word(symbols: list[int], left: int, right: int, merged: int) -> list[int]:
    """``symbols`` with every non-overlapping ``left right`` (scanned left to right) replaced."""
    out: list[int] = []
    i, n = 0, len(symbols)
    while i < n:
        if i + 1 < n and symbols[i] == left and symbols[i + 1] == right:
            out.append(merged)
            i += 2
        else:
            out.append(symbols[i])
            i += 1
    return out


def apply_merges(symbols: list[int], ranks: Mapping[Pair, tuple[int, int]]) -> list[int]:
    """Segment one chunk exactly as training did; ``ranks`` maps a pair to (rank, merged id).

    Merging the lowest-ranked pair present, repeatedly, is the same as applying
    every merge in rank order: a merge's result is a new id, so the pairs it
    creates all rank after it.
    """
    while len(symbols) > 1:
        best: tuple[int, int] | None = None
        at = (0, 0)
        for pair in itertools.pairwise(symbols):
            r = ranks.get(pair)
            if r is not None and (best is None or r < best):
                best, at = r, pair
        if best is None:
            break
        symbols = merge_word(symbols, at[0], at[1], best[1])
    return symbols


def rank_table(merges: Sequence[tuple[int, int, int]]) -> dict[Pair, tuple[int, int]]:
    """Pair -> (rank, merged id), for :func:`apply_merges`."""
    return {(a, b): (r, z) for r, (a, b, z) in enumerate(merges)}


@dataclass(frozen=True, slots=True)
class Learned:
    """What training produced: merges in rank order and the chunks' final symbols."""

    merges: list[tuple[int, int, int]]  # (left id, right id, merged id)
    merge_counts: list[int]  # pair frequency when the merge was chosen
    tokens: list[bytes]  # bytes of every id, reserved tokens included
    words: list[list[int]]  # each training chunk's symbols after the last merge


def _first_of(pair: Pair, where: set[int], words: Sequence[list[int]], sizes: Sequence[int]) -> tuple[int, int]:
    """The pair's first occurrence now: (chunk row, byte offset in the chunk)."""
    w = min(where)
    sym = words[w]
    a, b = pair
    offset = 0
    for i in range(len(sym) - 1):
        if sym[i] == a and sym[i + 1] == b:
            return w, offset
        offset += sizes[sym[i]]
    raise AssertionError("pair index out of step with chunk symbols")  # a bug, not bad input


def learn(words: list[list[int]], freqs: Sequence[int], tokens: list[bytes], *, limit: int, min_count: int) -> Learned:
    """Merge pairs until ``len(tokens) == limit`` or no pair occurs ``min_count`` times.

    ``words`` (chunk symbols in corpus order) and ``tokens`` are updated in place.
    Ties on count go to the pair whose first occurrence is earliest in corpus
    order: chunk row, then position within the chunk. Only integers are hashed,
    so the result does not depend on ``PYTHONHASHSEED``.

    Heap keys are ``(-count, first row, first byte offset, left, right)``; a byte
    offset, unlike a symbol index, does not move when symbols before it merge, and
    it orders positions within a chunk the same way. A merge
    creates pairs only with its new id, so an existing pair never gains: its
    count and first occurrence change only by losses, and an entry whose count
    is still current is exact. A popped entry with a stale count is pushed back
    with the true key; a pair is pushed once when it appears, so each pair has
    one live entry.
    """
    pairs = _Pairs(words, freqs, [len(t) for t in tokens])  # sizes: bytes per id
    heap = pairs.index(min_count)
    merges: list[tuple[int, int, int]] = []
    merge_counts: list[int] = []
    while heap and len(tokens) < limit:
        neg, _, _, a, b = heapq.heappop(heap)
        pair = (a, b)
        c = pairs.count.get(pair, 0)
        if c < min_count:
            continue  # counts only fall, so the pair is done
        if c != -neg:
            heapq.heappush(heap, (-c, *_first_of(pair, pairs.where[pair], words, pairs.sizes), a, b))
            continue
        z = len(tokens)
        tokens.append(tokens[a] + tokens[b])
        pairs.sizes.append(pairs.sizes[a] + pairs.sizes[b])
        merges.append((a, b, z))
        merge_counts.append(c)
        for p, at in pairs.merge(pair, z).items():
            if pairs.count[p] >= min_count:
                heapq.heappush(heap, (-pairs.count[p], *at, *p))
    return Learned(merges=merges, merge_counts=merge_counts, tokens=tokens, words=words)


HeapEntry = tuple[int, int, int, int, int]  # (-count, first row, first byte offset, left, right)


@dataclass(slots=True)
class _Pairs:
    """Adjacent-pair statistics of the training chunks, kept current as merges rewrite them:
    each pair's total count and the rows (chunks) holding it. ``words`` is updated in place."""

    words: list[list[int]]
    freqs: Sequence[int]
    sizes: list[int]  # bytes per id
    count: dict[Pair, int] = field(default_factory=dict)
    where: dict[Pair, set[int]] = field(default_factory=dict)

    def index(self, min_count: int) -> list[HeapEntry]:
        """Count every pair; return the heap of those occurring ``min_count`` times."""
        count, where, sizes = self.count, self.where, self.sizes
        first: dict[Pair, tuple[int, int]] = {}
        for w, sym in enumerate(self.words):
            f = self.freqs[w]
            offset = 0
            for i in range(len(sym) - 1):
                pair = (sym[i], sym[i + 1])
                count[pair] = count.get(pair, 0) + f
                rows = where.get(pair)
                if rows is None:
                    where[pair] = {w}
                    first[pair] = (w, offset)
                else:
                    rows.add(w)
                offset += sizes[sym[i]]
        heap = [(-c, *first[p], *p) for p, c in count.items() if c >= min_count]
        heapq.heapify(heap)
        return heap

    def merge(self, pair: Pair, merged: int) -> dict[Pair, tuple[int, int]]:
        """Replace ``pair`` by ``merged`` in every chunk holding it; return the pairs that
        appeared, each with its first occurrence (row, byte offset)."""
        born: dict[Pair, tuple[int, int]] = {}
        for w in sorted(self.where.pop(pair)):  # ascending rows: the first sighting is the first occurrence
            old = self.words[w]
            new, touched, sites = _merge_sites(old, pair, merged)
            self.words[w] = new
            self._lose(w, old, new, touched, pair)
            self._gain(w, new, sites, born)
        del self.count[pair]
        return born

    def _lose(self, w: int, old: list[int], new: list[int], touched: set[int], pair: Pair) -> None:
        """Take row ``w``'s pairs that vanished around the merge sites out of the counts."""
        count, f, n = self.count, self.freqs[w], len(old)
        lost: set[Pair] = set()
        for j in touched:
            if 0 <= j < n - 1:
                p = (old[j], old[j + 1])
                if p == pair:
                    continue  # an overlapping run of the merged pair; dropped in merge()
                left = count[p] - f
                if left:
                    count[p] = left
                else:
                    del count[p]
                lost.add(p)
        if lost:
            for p in lost.difference(itertools.pairwise(new)):
                rows = self.where[p]
                rows.discard(w)
                if not rows:
                    del self.where[p]

    def _gain(self, w: int, new: list[int], sites: list[int], born: dict[Pair, tuple[int, int]]) -> None:
        """Count row ``w``'s pairs next to each merged symbol; note first sightings in ``born``."""
        count, where, sizes, f = self.count, self.where, self.sizes, self.freqs[w]
        last = -1
        for k in sites:
            for j in (k - 1, k):
                if last < j < len(new) - 1:  # ascending, each position once
                    last = j
                    p = (new[j], new[j + 1])
                    count[p] = count.get(p, 0) + f
                    where.setdefault(p, set()).add(w)
                    if p not in born:
                        born[p] = (w, sum(sizes[s] for s in new[:j]))


def _merge_sites(old: list[int], pair: Pair, merged: int) -> tuple[list[int], set[int], list[int]]:
    """``old`` with ``pair`` merged (left to right), the positions in ``old`` of the pairs that
    vanish next to each merge, and the positions of ``merged`` in the result."""
    a, b = pair
    n = len(old)
    new: list[int] = []
    touched: set[int] = set()
    sites: list[int] = []
    i = 0
    while i < n:
        if i + 1 < n and old[i] == a and old[i + 1] == b:
            touched.add(i - 1)
            touched.add(i + 1)
            sites.append(len(new))
            new.append(merged)
            i += 2
        else:
            new.append(old[i])
            i += 1
    return new, touched, sites


# -- the symbols training starts from -------------------------------------------
def read_counts(counts: pa.Table) -> tuple[list[bytes], np.ndarray]:
    """Chunk keys (corpus order) and their counts from a ``key, count`` table."""
    if "key" not in counts.column_names or "count" not in counts.column_names:
        raise TokenizerError(f"chunk counts need columns 'key' and 'count', got {counts.column_names}")
    keys = [bytes(k) for k in counts.column("key").to_pylist()]
    freqs = counts.column("count").to_numpy().astype(np.int64)
    if len(freqs) and freqs.min() < 1:
        raise TokenizerError("chunk counts must be positive")
    return keys, freqs


def _split(flat: list[int], lengths: Sequence[int], tail: list[int]) -> list[list[int]]:
    ends = list(itertools.accumulate(lengths))
    return [flat[e - n : e] + tail for e, n in zip(ends, lengths, strict=True)]


def byte_symbols(
    keys: list[bytes], freqs: np.ndarray, n_reserved: int
) -> tuple[list[bytes], np.ndarray, list[list[int]]]:
    """Alphabet of all 256 bytes, byte counts, and each chunk as byte ids."""
    data = np.frombuffer(b"".join(keys), dtype=np.uint8)
    lengths = [len(k) for k in keys]
    weights = np.repeat(freqs, lengths)
    counts = np.zeros(256, dtype=np.int64)
    np.add.at(counts, data, weights)
    words = _split((data.astype(np.int64) + n_reserved).tolist(), lengths, [])
    return [bytes([b]) for b in range(256)], counts, words


def char_symbols(
    keys: list[bytes], freqs: np.ndarray, n_reserved: int, marker: str
) -> tuple[list[bytes], np.ndarray, list[list[int]]]:
    """Alphabet of the characters seen (code-point order) plus the marker, counts, chunk ids."""
    try:
        texts = [k.decode("utf-8") for k in keys]
    except UnicodeDecodeError as exc:
        raise TokenizerError(f"a chunk key is not UTF-8 ({exc}); base = 'chars' needs text keys") from exc
    points = np.frombuffer("".join(texts).encode("utf-32-le"), dtype="<u4")
    seen, inverse = np.unique(points, return_inverse=True)
    alphabet = [chr(c).encode("utf-8") for c in seen.tolist()]
    lengths = [len(t) for t in texts]
    counts = np.zeros(len(seen) + bool(marker), dtype=np.int64)
    np.add.at(counts, inverse.ravel(), np.repeat(freqs, lengths))
    tail: list[int] = []
    if marker:
        if marker.encode("utf-8") in alphabet:
            raise TokenizerError(
                f"end_of_word {marker!r} occurs as a character of the training text; choose a marker that does not"
            )
        alphabet.append(marker.encode("utf-8"))
        counts[-1] = int(freqs.sum())
        tail = [n_reserved + len(alphabet) - 1]
    words = _split((inverse.ravel().astype(np.int64) + n_reserved).tolist(), lengths, tail)
    return alphabet, counts, words
