"""Byte-pair encoding: learning merges, and applying them to chunks.

The learning rule is the one of Sennrich, Haddow & Birch (ACL 2016), section
3.2: repeatedly replace the most frequent adjacent symbol pair by a new symbol.
Symbols are integer ids and every merge makes a new id. (The paper's version
names symbols by their strings; the two agree as long as no merge spells an
existing token a second way, which greedy left-to-right merging has not done in
any corpus we tried; the tests compare against a string-based trainer.)

Each distinct chunk is stored once with its frequency; all chunks' symbols sit in
one linked list of slots (:class:`_Chain`), so a merge touches only the slots where
the merged pair occurs, not the whole chunks holding it. Pair counts and, per
pair, the slots where it occurs are kept up to date after each merge; text in
many scripts has very many distinct chunks and pairs, so the first count is a
numpy group-by, large merges are array operations and pairs that fall below the
minimum count are forgotten. The next pair comes from a heap with lazy
invalidation: every pair always has an entry whose key is at most its true key
``(-count, first slot)``; a popped entry whose key is out of date is pushed back
with a truer key, so the entry that survives a pop with its true key is the true
best pair.
"""

from __future__ import annotations

import array
import heapq
import itertools
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe.errors import TokenizerError
from seqpipe.progress import bar

Pair = tuple[int, int]
# A merge seen at no more slots than this runs in plain Python (see _Chain); tests set it to 0
# and to a large number to prove both ways against the naive trainer.
FEW: Final = 48


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
class RankArrays:
    """The merges as sorted pair codes (``left * width + right``) with each one's rank and merged id,
    for :func:`apply_merges_many`."""

    width: int
    codes: np.ndarray
    ranks: np.ndarray
    merged: np.ndarray

    @classmethod
    def of(cls, merges: Sequence[tuple[int, int, int]], width: int) -> RankArrays:
        table = np.array(merges, dtype=np.int64).reshape(-1, 3)
        codes = table[:, 0] * width + table[:, 1]
        order = np.argsort(codes, kind="stable")
        return cls(width, codes[order], order.astype(np.int64), table[order, 2])


def apply_merges_many(flat: np.ndarray, lengths: np.ndarray, ranks: RankArrays) -> tuple[np.ndarray, np.ndarray]:
    """:func:`apply_merges` on many chunks at once (``flat`` symbols, ``lengths`` per chunk): each
    round merges, in every chunk still changing, the lowest-ranked pair it holds; chunks with no
    merge left leave the working set. Returns the symbols and lengths after the last merge."""
    rows = len(lengths)
    sym = np.asarray(flat, dtype=np.int64)
    row = np.repeat(np.arange(rows, dtype=np.int64), lengths)
    done_sym: list[np.ndarray] = []
    done_row: list[np.ndarray] = []
    top = len(ranks.codes) - 1
    while len(sym) > 1 and top >= 0:
        codes = sym[:-1] * ranks.width + sym[1:]
        at = np.minimum(np.searchsorted(ranks.codes, codes), top)
        hit = (row[:-1] == row[1:]) & (ranks.codes[at] == codes)
        active = np.zeros(rows, dtype=bool)
        active[row[:-1][hit]] = True
        still = active[row]
        done_sym.append(sym[~still])
        done_row.append(row[~still])
        if not hit.any():
            sym, row = sym[:0], row[:0]
            break
        rank = np.where(hit, ranks.ranks[at], len(ranks.codes))
        best = np.full(rows, len(ranks.codes), dtype=np.int64)
        np.minimum.at(best, row[:-1], rank)
        site = np.flatnonzero(hit & (rank == best[row[:-1]]))
        if len(site) > 1 and np.any(site[1:] == site[:-1] + 1):
            site = _every_other(site)  # a run of one pair x x: left to right, each merge takes two
        keep = np.ones(len(sym), dtype=bool)
        keep[site + 1] = False
        sym = sym.copy()
        sym[site] = ranks.merged[at[site]]
        keep &= still
        sym, row = sym[keep], row[keep]
    done_sym.append(sym)
    done_row.append(row)
    all_rows = np.concatenate(done_row)
    order = np.argsort(all_rows, kind="stable")  # stable: a chunk's symbols keep their order
    out_lengths = np.bincount(all_rows, minlength=rows).astype(np.int64)
    return np.concatenate(done_sym)[order], out_lengths


def _every_other(site: np.ndarray) -> np.ndarray:
    """Of ascending sites, those a left-to-right scan merges where sites run on (``s``, ``s + 1``)."""
    linked = np.concatenate([[False], site[1:] == site[:-1] + 1])
    run_start = np.flatnonzero(~linked)
    step = np.arange(len(site)) - run_start[np.cumsum(~linked) - 1]
    kept: np.ndarray = site[step % 2 == 0]
    return kept


@dataclass(frozen=True, slots=True)
class Learned:
    """What training produced: merges in rank order and the chunks' final symbols."""

    merges: list[tuple[int, int, int]]  # (left id, right id, merged id)
    merge_counts: list[int]  # pair frequency when the merge was chosen
    tokens: list[bytes]  # bytes of every id, reserved tokens included
    symbols: np.ndarray  # every training chunk's symbols after the last merge, chunk after chunk
    offsets: np.ndarray  # chunk ``i`` is ``symbols[offsets[i]:offsets[i + 1]]``


def learn(
    flat: np.ndarray,
    lengths: np.ndarray,
    freqs: np.ndarray,
    tokens: list[bytes],
    *,
    limit: int,
    min_count: int,
    show: bool = False,
) -> Learned:
    """Merge pairs until ``len(tokens) == limit`` or no pair occurs ``min_count`` times.

    ``flat`` holds the chunks' starting symbols one chunk after another (``lengths`` each, in
    corpus order), ``freqs`` each chunk's count; ``tokens`` (bytes per id) is extended in place.
    Ties on count go to the pair whose first occurrence is earliest in corpus order: chunk row,
    then position within the chunk. Only integers are compared, so the result does not depend on
    ``PYTHONHASHSEED``. ``show``: a progress bar counting merges.

    Heap keys are ``(-count, first slot, pair code)``, packed in one integer (``HeapEntry``); a
    slot (see :class:`_Chain`) orders occurrences by row, then position, and does not move when
    symbols before it merge. A merge
    creates pairs only with its new id, so an existing pair never gains: its count and first
    occurrence change only by losses, so an entry pushed with the true key is exact while its
    count is current. A popped entry with a stale count is pushed back with the current count and
    its old first slot (still a lower bound; finding the true one costs a search, often wasted
    on a pair that loses again before it is popped); popped again with a current count, its true
    first slot is looked up, and it is pushed back once more if that differs. A pair is pushed
    once when it appears, so each pair has one live entry. A pair below ``min_count`` can never reach it
    again, so it is forgotten (counts, positions) the moment it falls below.
    """
    merges: list[tuple[int, int, int]] = []
    merge_counts: list[int] = []
    with bar(max(0, limit - len(tokens)), "byte-pair merges", unit="merge", show=show) as pbar:
        pbar.set_postfix_str("counting pairs")  # the bar is up before the one long step that precedes merging
        chain = _Chain.index(flat, lengths, freqs, max(limit, len(tokens)), min_count)
        heap = chain.heap()
        width, code_bits, count_shift = chain.width, chain.code_bits, chain.count_shift
        code_mask, slot_mask = (1 << code_bits) - 1, (1 << (count_shift - code_bits)) - 1
        pbar.set_postfix_str("")
        loose: set[int] = set()  # pairs whose entry's first slot may be too early
        while heap and len(tokens) < limit:
            key = heapq.heappop(heap)
            code = key & code_mask
            c = chain.count.get(code, 0)
            if c < min_count:
                loose.discard(code)
                continue  # counts only fall, so the pair is done
            if c != -(key >> count_shift):
                # the old first slot is still a lower bound
                heapq.heappush(heap, (-c << count_shift) + (key & ((1 << count_shift) - 1)))
                loose.add(code)
                continue
            if code in loose:
                loose.discard(code)
                first = chain.first(code)
                if first != (key >> code_bits) & slot_mask:
                    heapq.heappush(heap, (-c << count_shift) + (first << code_bits) + code)
                    continue
            a, b = divmod(code, width)
            z = len(tokens)
            tokens.append(tokens[a] + tokens[b])
            merges.append((a, b, z))
            merge_counts.append(c)
            for entry in chain.merge(code, z):
                heapq.heappush(heap, entry)
            pbar.update(1)
    symbols, offsets = chain.words(np.asarray(lengths, dtype=np.int64))
    return Learned(merges=merges, merge_counts=merge_counts, tokens=tokens, symbols=symbols, offsets=offsets)


# A heap entry is one integer ordered as the tuple (-count, first slot, pair code) is:
# ``(-count << count_shift) + (first slot << code_bits) + code``, each field in its own bits
# (see _Chain), so the heap compares plain integers.
HeapEntry = int
# Where a pair was seen: an array, or a short list of slots (a pair born in a small merge, where
# making an array costs more than it saves).
Slots = np.ndarray | list[int]


@dataclass(slots=True)
class _Chain:
    """The training chunks as one doubly linked list of symbol slots, with pair counts and positions.

    Slot ``s`` starts as the ``s``-th starting symbol of all chunks in corpus order; a merge
    writes the new id into its left slot and kills the right one (symbol -1), so slot order is
    row order, then position order, for ever. ``nxt``/``prv`` link the live slots of a chunk;
    slot ``n`` is a sentinel (symbol -1) that ends every chunk. A pair is the integer code
    ``left * width + right``. Per pair kept (count at least ``min_count``): its count, and the
    ascending slots where it was seen (a slice of the sorted first index, or an array or list
    made when it appeared; stale slots are dropped when read, by checking the symbols there).

    A merge of many occurrences runs as numpy array operations; most merges late in training
    have a few occurrences, where a numpy call costs more than the work, so those run as plain
    Python over ``array.array`` twins of the same memory (``_few``).
    """

    sym: np.ndarray
    nxt: np.ndarray
    prv: np.ndarray
    weight: np.ndarray  # count of each slot's chunk (0 for the sentinel)
    twins: tuple[array.array[int], array.array[int], array.array[int], array.array[int]]  # sym nxt prv weight
    width: int
    min_count: int
    count: dict[int, int]
    sorted_slots: np.ndarray  # slots of the first index, grouped by pair
    groups: dict[int, tuple[int, int]]  # pair -> its range in sorted_slots
    added: dict[int, Slots] = field(default_factory=dict)
    firsts: list[HeapEntry] = field(default_factory=list)
    code_bits: int = 0  # a pair code fits in this many bits, a slot in count_shift - code_bits
    count_shift: int = 0

    @classmethod
    def index(cls, flat: np.ndarray, lengths: np.ndarray, freqs: np.ndarray, width: int, min_count: int) -> _Chain:
        """Link the chunks and count every adjacent pair with vectorized group-bys."""
        n = len(flat)
        lengths = np.asarray(lengths, dtype=np.int64)
        ends = np.cumsum(lengths)
        sym = np.empty(n + 1, dtype=np.int64)
        sym[:n] = flat
        sym[n] = -1
        nxt = np.arange(1, n + 2, dtype=np.int64)
        prv = np.arange(-1, n, dtype=np.int64)
        nonempty = lengths > 0
        nxt[ends[nonempty] - 1] = n
        prv[(ends - lengths)[nonempty]] = n
        nxt[n] = prv[n] = n
        weight = np.zeros(n + 1, dtype=np.int64)
        weight[:n] = np.repeat(np.asarray(freqs, dtype=np.int64), lengths)
        left = np.flatnonzero(nxt[:n] != n)
        codes = sym[left] * width + sym[left + 1]
        twins = tuple(_twin(a) for a in (sym, nxt, prv, weight))
        sym, nxt, prv, weight = (np.frombuffer(t, dtype=np.int64) for t in twins)  # one memory, two views
        chain = cls(sym, nxt, prv, weight, twins, width, min_count, {}, np.empty(0, np.int64), {})  # type: ignore[arg-type]
        chain.code_bits = (width * width).bit_length()
        chain.count_shift = chain.code_bits + len(sym).bit_length()
        chain.firsts = chain._group(codes, left, keep_slots=True)
        return chain

    def _group(self, codes: np.ndarray, slots: np.ndarray, *, keep_slots: bool = False) -> list[HeapEntry]:
        """Count pairs ``codes`` seen at ascending ``slots``; keep those reaching ``min_count``
        (count and positions); return their heap entries."""
        if not len(codes):
            return []
        codes, slots = _by_pair(codes, slots, len(self.sym))
        starts = np.flatnonzero(np.concatenate([[True], codes[1:] != codes[:-1]]))
        totals = np.add.reduceat(self.weight[slots], starts)
        stops = np.append(starts[1:], len(codes))
        keep = np.flatnonzero(totals >= self.min_count)
        kept_codes = codes[starts[keep]].tolist()
        kept_totals = totals[keep].tolist()
        kept_firsts = slots[starts[keep]].tolist()
        self.count.update(zip(kept_codes, kept_totals, strict=True))
        if keep_slots:
            self.sorted_slots = slots
            self.groups = dict(
                zip(kept_codes, zip(starts[keep].tolist(), stops[keep].tolist(), strict=True), strict=True)
            )
        else:
            for code, lo, hi in zip(kept_codes, starts[keep].tolist(), stops[keep].tolist(), strict=True):
                self.added[code] = slots[lo:hi]
        shift, bits = self.count_shift, self.code_bits
        return [(-t << shift) + (f << bits) + c for c, t, f in zip(kept_codes, kept_totals, kept_firsts, strict=True)]

    def heap(self) -> list[HeapEntry]:
        """The heap of the pairs counted by :meth:`index`."""
        heap, self.firsts = self.firsts, []
        heapq.heapify(heap)
        return heap

    def _seen(self, code: int) -> Slots:
        """The slots where pair ``code`` was seen (taken out: the caller puts back what it keeps).
        A pair is in ``added`` or in ``groups``, never both: a pair appears after the first index
        only with a merge's new id, so it is never one the index saw."""
        slots = self.added.pop(code, None)
        if slots is not None:
            return slots
        lo, hi = self.groups.pop(code)
        return self.sorted_slots[lo:hi]

    def _where(self, slots: Slots, code: int) -> np.ndarray:
        """Ascending slots of ``slots`` where pair ``code`` occurs now."""
        pos = np.asarray(slots, dtype=np.int64)
        a, b = divmod(code, self.width)
        found: np.ndarray = pos[(self.sym[pos] == a) & (self.sym[self.nxt[pos]] == b)]
        return found

    def first(self, code: int) -> int:
        """The slot of the pair's first occurrence now (its positions compacted on the way)."""
        slots = self._seen(code)
        if isinstance(slots, list):
            sym, nxt = self.twins[0], self.twins[1]
            a, b = divmod(code, self.width)
            live = [s for s in slots if sym[s] == a and sym[nxt[s]] == b]
            self.added[code] = live
            return live[0]
        pos = self._where(slots, code)
        self.added[code] = pos
        return int(pos[0])

    def merge(self, code: int, merged: int) -> list[HeapEntry]:
        """Replace pair ``code`` by ``merged`` everywhere (left to right within a chunk); update
        the counts; return heap entries of the pairs that appeared and reach ``min_count``."""
        slots = self._seen(code)
        del self.count[code]
        if len(slots) <= FEW:
            return self._few(slots, code, merged)
        sym, nxt, prv, n = self.sym, self.nxt, self.prv, len(self.sym) - 1
        pos = self._where(slots, code)
        if len(pos) > 1 and code // self.width == code % self.width:
            pos = _left_to_right(pos, nxt)
        right = nxt[pos]
        after = nxt[right]
        before = prv[pos]
        lost = _beside(before, right, before != n, after != n)
        lost_codes = sym[lost] * self.width + sym[nxt[lost]]
        keep = lost_codes != code  # the rest of a run of the merged pair; its count is gone already
        if np.any(keep):
            unique, inverse = np.unique(lost_codes[keep], return_inverse=True)
            totals = np.bincount(inverse.ravel(), weights=self.weight[lost[keep]], minlength=len(unique))
            self._lose(zip(unique.tolist(), totals.astype(np.int64).tolist(), strict=True))
        sym[pos] = merged
        sym[right] = -1
        nxt[pos] = after
        prv[after] = pos
        prv[n] = n
        before = prv[pos]
        gained = _beside(before, pos, before != n, after != n)
        return self._group(sym[gained] * self.width + sym[nxt[gained]], gained)

    def _few(self, slots: Slots, code: int, merged: int) -> list[HeapEntry]:
        """:meth:`merge` for a pair seen at a few slots, in plain Python (same result), in one pass.

        Occurrences are merged in slot order as they are found. A later occurrence's own two
        symbols are untouched by earlier merges, so finding it on the changing chain finds what
        a scan before any merge finds. The pair left of an occurrence that directly follows the
        previous one (its left neighbour is the previous merge's slot) was already counted lost
        as that merge's right neighbour, and its new pair is counted once. The new pair right of
        an occurrence ends in the merged id when the next occurrence starts right after it."""
        sym, nxt, prv, weight = self.twins
        n, width = len(sym) - 1, self.width
        a, b = divmod(code, width)
        count, min_count, added, groups = self.count, self.min_count, self.added, self.groups
        shift, bits = self.count_shift, self.code_bits
        born: dict[int, list[int]] = {}  # new pair -> [count, slots...] (ascending)
        bw, mw = b * width, merged * width
        last = -1  # the slot of the last merge
        for s in slots if isinstance(slots, list) else slots.tolist():
            if sym[s] != a:
                continue
            r = nxt[s]
            if sym[r] != b:
                continue
            w = weight[s]
            p = prv[s]
            # a lost pair's count falls at once; one that falls below min_count is forgotten there
            # (counts only fall, so it could not come back); the merged pair's own count is gone
            if p != n and p != last:
                x = sym[p] * width
                c = x + a
                k = count.get(c)
                if k is not None and c != code:
                    if k - w >= min_count:
                        count[c] = k - w
                    else:
                        del count[c]
                        added.pop(c, None)
                        groups.pop(c, None)
                c = x + merged
                seen = born.get(c)
                if seen is None:
                    born[c] = [w, p]
                else:
                    seen[0] += w
                    seen.append(p)
            after = nxt[r]
            if after != n:
                y = sym[after]
                c = bw + y
                k = count.get(c)
                if k is not None and c != code:
                    if k - w >= min_count:
                        count[c] = k - w
                    else:
                        del count[c]
                        added.pop(c, None)
                        groups.pop(c, None)
                # the symbol after is final unless the next occurrence starts there
                c = mw + (merged if y == a and sym[nxt[after]] == b else y)
                seen = born.get(c)
                if seen is None:
                    born[c] = [w, s]
                else:
                    seen[0] += w
                    seen.append(s)
                prv[after] = s
            sym[s] = merged
            sym[r] = -1
            nxt[s] = after
            last = s
        entries: list[HeapEntry] = []
        for c, seen in born.items():
            total = seen[0]
            if total >= min_count:  # most pairs born late in training occur once: no copy for those
                count[c] = total
                added[c] = seen[1:]
                entries.append((-total << shift) + (seen[1] << bits) + c)
        return entries

    def _lose(self, totals: Iterable[tuple[int, int]]) -> None:
        """Subtract each pair's total from its count; forget pairs below ``min_count``."""
        count = self.count
        for code, t in totals:
            c = count.get(code)
            if c is None:
                continue
            if c - t >= self.min_count:
                count[code] = c - t
            else:
                del count[code]
                self.added.pop(code, None)
                self.groups.pop(code, None)

    def words(self, lengths: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Every chunk's live symbols, chunk after chunk, and the offsets of each chunk
        (``lengths``: each chunk's starting symbols, as indexed)."""
        n, rows = len(self.sym) - 1, len(lengths)
        alive = self.sym[:n] >= 0
        row_of = np.repeat(np.arange(rows, dtype=np.int64), lengths)
        offsets = np.zeros(rows + 1, dtype=np.int64)
        np.cumsum(np.bincount(row_of[alive], minlength=rows), out=offsets[1:])
        return self.sym[:n][alive], offsets


def _twin(values: np.ndarray) -> array.array[int]:
    """An ``array.array`` copy of int64 ``values``, copied once straight from their memory."""
    twin = array.array("q")
    twin.frombytes(np.ascontiguousarray(values, dtype=np.int64).data.cast("B"))
    return twin


def _by_pair(codes: np.ndarray, slots: np.ndarray, span: int) -> tuple[np.ndarray, np.ndarray]:
    """``codes`` and ``slots`` ordered by pair, slots ascending within a pair (``slots`` below ``span``).

    Where ``code * span + slot`` fits in 63 bits, one plain sort of those keys does it: the keys
    are distinct, so an unstable sort gives the order a stable argsort would, without the gathers."""
    top = int(codes.max()) if len(codes) else 0
    if top < (2**62) // max(span, 1):
        keys = codes * span + slots
        keys.sort()
        by_code = keys // span
        return by_code, keys - by_code * span
    order = np.argsort(codes, kind="stable")  # stable: slots stay ascending within a pair
    return codes[order], slots[order]


def _beside(left: np.ndarray, right: np.ndarray, left_ok: np.ndarray, right_ok: np.ndarray) -> np.ndarray:
    """The slots ``left[i]``, ``right[i]`` of every occurrence ``i`` where ``ok``, ascending and
    each once. Occurrences are ascending and do not overlap, so ``right[i - 1] <= left[i]``, equal
    only where two occurrences share the slot between them: interleaving sorts, and dropping a
    slot equal to the one before it removes the repeats (no sort needed)."""
    both = np.empty(2 * len(left), dtype=left.dtype)
    both[0::2], both[1::2] = left, right
    ok = np.empty(2 * len(left), dtype=bool)
    ok[0::2], ok[1::2] = left_ok, right_ok
    ok[1:] &= both[1:] != both[:-1]
    kept: np.ndarray = both[ok]
    return kept


def _left_to_right(pos: np.ndarray, nxt: np.ndarray) -> np.ndarray:
    """Of a pair ``x x`` seen at ascending ``pos``, the occurrences a left-to-right scan merges:
    in a run where each occurrence starts at the previous one's right symbol, every other one."""
    linked = np.concatenate([[False], nxt[pos[:-1]] == pos[1:]])
    run_start = np.flatnonzero(~linked)
    run = np.cumsum(~linked) - 1
    step = np.arange(len(pos)) - run_start[run]
    kept: np.ndarray = pos[step % 2 == 0]
    return kept


# -- the symbols training starts from -------------------------------------------
def read_counts(counts: pa.Table) -> tuple[pa.Array, np.ndarray]:
    """Chunk keys (corpus order, one binary array) and their counts from a ``key, count`` table."""
    if "key" not in counts.column_names or "count" not in counts.column_names:
        raise TokenizerError(f"chunk counts need columns 'key' and 'count', got {counts.column_names}")
    column = counts.column("key")
    binary = (
        pa.large_binary()
        if pa.types.is_large_binary(column.type) or pa.types.is_large_string(column.type)
        else pa.binary()
    )
    keys = column.combine_chunks().cast(binary) if column.num_chunks != 1 else column.chunk(0).cast(binary)
    if keys.null_count:
        raise TokenizerError("chunk counts hold a null key; every row needs a chunk")
    freqs = counts.column("count").to_numpy().astype(np.int64)
    if len(freqs) and freqs.min() < 1:
        raise TokenizerError("chunk counts must be positive")
    return keys, freqs


def _bytes_of(keys: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """The bytes of all ``keys`` (binary, no nulls) one after another, and each key's length."""
    if not len(keys):
        return np.zeros(0, np.uint8), np.zeros(0, np.int64)
    width = np.int64 if pa.types.is_large_binary(keys.type) else np.int32
    _, offset_buffer, data_buffer = keys.buffers()
    offsets = np.frombuffer(offset_buffer, dtype=width)[keys.offset : keys.offset + len(keys) + 1].astype(np.int64)
    if data_buffer is None:  # every key empty
        return np.zeros(0, np.uint8), np.diff(offsets)
    data = np.frombuffer(data_buffer, dtype=np.uint8)[offsets[0] : offsets[-1]]
    return data, np.diff(offsets)


def byte_symbols(
    keys: pa.Array, freqs: np.ndarray, n_reserved: int
) -> tuple[list[bytes], np.ndarray, np.ndarray, np.ndarray]:
    """Alphabet of all 256 bytes, byte counts, and the chunks as byte ids (flat) with their lengths."""
    data, lengths = _bytes_of(keys)
    counts = np.bincount(data, weights=np.repeat(freqs, lengths), minlength=256).astype(np.int64)
    return [bytes([b]) for b in range(256)], counts, data.astype(np.int64) + n_reserved, lengths


def char_symbols(
    keys: pa.Array, freqs: np.ndarray, n_reserved: int, marker: str
) -> tuple[list[bytes], np.ndarray, np.ndarray, np.ndarray]:
    """Alphabet of the characters seen (code-point order) plus the marker, counts, and the chunks
    as ids (flat, the marker ending each) with their lengths."""
    try:
        lengths = pc.utf8_length(keys.cast(pa.large_string())).to_numpy().astype(np.int64)  # the cast checks UTF-8
    except pa.ArrowInvalid as exc:
        raise TokenizerError(f"a chunk key is not UTF-8 ({exc}); base = 'chars' needs text keys") from exc
    data, _ = _bytes_of(keys)
    # each key is UTF-8 (checked above), so their bytes one after another decode as one text
    points = np.frombuffer(data.tobytes().decode("utf-8").encode("utf-32-le"), dtype="<u4").astype(np.int64)
    # a table over code points up to the largest seen (at most 0x10FFFF entries) numbers the
    # characters in code-point order without sorting every character of every chunk
    weighted = np.bincount(points, weights=np.repeat(freqs, lengths)) if len(points) else np.zeros(0)
    seen = np.flatnonzero(np.bincount(points)) if len(points) else np.zeros(0, np.int64)
    number = np.zeros(len(weighted), dtype=np.int64)
    number[seen] = np.arange(len(seen))
    inverse = number[points]
    alphabet = [chr(c).encode("utf-8") for c in seen.tolist()]
    counts = np.zeros(len(seen) + bool(marker), dtype=np.int64)
    counts[: len(seen)] = weighted[seen]
    flat = inverse.ravel().astype(np.int64) + n_reserved
    if marker:
        if marker.encode("utf-8") in alphabet:
            raise TokenizerError(
                f"end_of_word {marker!r} occurs as a character of the training text; choose a marker that does not"
            )
        alphabet.append(marker.encode("utf-8"))
        counts[-1] = int(freqs.sum())
        flat = np.insert(flat, np.cumsum(lengths), n_reserved + len(alphabet) - 1)
        lengths = lengths + 1
    return alphabet, counts, flat, lengths
