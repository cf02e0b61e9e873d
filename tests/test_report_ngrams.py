"""Packed n-gram counting and window hashing (seqpipe.report.ngrams)."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqpipe.errors import SeqpipeError
from seqpipe.report.ngrams import (
    count_ngrams,
    distinct_sorted,
    filler,
    key_bits,
    pack,
    unpack,
    window_hashes,
    window_keys,
)


@st.composite
def corpora(draw: st.DrawFn, max_vocab: int = 40) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Random ids with random document ranges (gaps between documents allowed)."""
    vocab = draw(st.integers(1, max_vocab))
    docs = draw(st.lists(st.lists(st.integers(0, vocab - 1), max_size=12), max_size=8))
    gaps = draw(st.lists(st.integers(0, 2), min_size=len(docs), max_size=len(docs)))
    ids: list[int] = []
    starts, lengths = [], []
    for doc, gap in zip(docs, gaps, strict=True):
        ids += [vocab - 1] * gap  # tokens outside every document (think: markers)
        starts.append(len(ids))
        lengths.append(len(doc))
        ids += doc
    return (np.array(ids, dtype=np.uint16), np.array(starts, np.int64), np.array(lengths, np.int64), vocab)


def counter_reference(ids: np.ndarray, starts: np.ndarray, lengths: np.ndarray, n: int) -> Counter[tuple[int, ...]]:
    """The plain Python definition: tuples of every window inside one document."""
    out: Counter[tuple[int, ...]] = Counter()
    for s, m in zip(starts.tolist(), lengths.tolist(), strict=True):
        doc = ids[s : s + m].tolist()
        out.update(tuple(doc[i : i + n]) for i in range(len(doc) - n + 1))
    return out


@settings(max_examples=200, deadline=None)
@given(corpora(), st.sets(st.integers(1, 4), min_size=1))
def test_counts_equal_counter_over_tuples(corpus: tuple, orders: set[int]) -> None:
    """Every order counted from one sort equals collections.Counter over tuples of the windows."""
    ids, starts, lengths, vocab = corpus
    counted = count_ngrams(ids, sorted(orders), bits=key_bits(vocab), starts=starts, lengths=lengths)
    for n in orders:
        got = counted[n]
        expected = counter_reference(ids, starts, lengths, n)
        assert dict(zip(map(tuple, got.ids().tolist()), got.counts.tolist(), strict=True)) == expected
        assert bool((got.keys[1:] > got.keys[:-1]).all())
        assert got.total == sum(expected.values())


@settings(max_examples=150, deadline=None)
@given(corpora(), st.integers(1, 4), st.integers(1, 9), st.integers(1, 3))
def test_counts_do_not_depend_on_pieces_or_threads(corpus: tuple, n: int, chunk: int, threads: int) -> None:
    """Counting in pieces of any size on any number of threads gives the one-sort answer."""
    ids, starts, lengths, vocab = corpus
    orders = list(range(1, n + 1))
    whole = count_ngrams(ids, orders, bits=key_bits(vocab), starts=starts, lengths=lengths, threads=1, chunk=1 << 30)
    pieces = count_ngrams(
        ids, orders, bits=key_bits(vocab), starts=starts, lengths=lengths, threads=threads, chunk=chunk
    )
    for k in orders:
        assert np.array_equal(whole[k].keys, pieces[k].keys)
        assert np.array_equal(whole[k].counts, pieces[k].counts)


def test_pieces_on_a_skewed_corpus_equal_counter() -> None:
    """One id holding most windows (one oversized bucket) and documents cut across pieces."""
    rng = np.random.default_rng(3)
    ids = np.where(rng.random(5000) < 0.7, 0, rng.integers(0, 300, 5000)).astype(np.uint16)
    starts = np.array([0, 10, 2500, 2501, 4000], np.int64)
    lengths = np.array([7, 2400, 0, 1400, 1000], np.int64)
    counted = count_ngrams(ids, [2, 3], bits=key_bits(300), starts=starts, lengths=lengths, threads=2, chunk=97)
    for n in (2, 3):
        got = counted[n]
        expected = counter_reference(ids, starts, lengths, n)
        assert dict(zip(map(tuple, got.ids().tolist()), got.counts.tolist(), strict=True)) == expected


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 70_000), st.integers(1, 4), st.data())
def test_pack_unpack_round_trip(vocab: int, n: int, data: st.DataObject) -> None:
    """unpack(pack(columns)) gives the columns back, and key order is lexicographic id order."""
    bits = key_bits(vocab)
    if n * bits > 64:
        n = 64 // bits
    rows = data.draw(st.lists(st.lists(st.integers(0, vocab - 1), min_size=n, max_size=n), min_size=1))
    arr = np.array(rows, dtype=np.int64)
    keys = pack([arr[:, i] for i in range(n)], bits)
    assert unpack(keys, n, bits).tolist() == rows
    order = np.argsort(keys, kind="stable")
    assert [rows[i] for i in order] == sorted(rows)


def test_window_keys_fill_past_document_end() -> None:
    """The last positions of a document carry filler slots, never ids of the next document."""
    ids = np.array([9, 1, 2, 9, 3, 9], dtype=np.uint8)
    bits = key_bits(10)
    keys = window_keys(ids, 3, bits=bits, starts=np.array([1, 4]), lengths=np.array([2, 1]))
    f = filler(bits)
    assert unpack(keys, 3, bits).tolist() == [[1, 2, f], [2, f, f], [3, f, f]]


def test_most_common_breaks_ties_by_id_order() -> None:
    """most_common sorts by descending count, ties in ascending id order."""
    ids = np.array([5, 3, 5, 3, 1, 7], dtype=np.uint8)
    uni = count_ngrams(ids, [1], bits=key_bits(8))[1]
    rows, counts = uni.most_common(3)
    assert rows[:, 0].tolist() == [3, 5, 1]
    assert counts.tolist() == [2, 2, 1]


def test_orders_that_do_not_fit_a_key_are_refused() -> None:
    """Too many slots for 64 bits, or an id as large as the filler, raise our error."""
    ids = np.array([1, 2, 3, 4, 5], dtype=np.uint32)
    with pytest.raises(SeqpipeError, match="64-bit key"):
        count_ngrams(ids, [3], bits=22)
    with pytest.raises(SeqpipeError, match="does not fit"):
        count_ngrams(np.array([7], np.uint8), [1], bits=3)


@settings(max_examples=150, deadline=None)
@given(corpora(max_vocab=6), st.integers(1, 5))
def test_window_hashes_identify_windows(corpus: tuple, n: int) -> None:
    """One hash per in-document window; equal windows hash alike, distinct ones differ here."""
    ids, starts, lengths, _ = corpus
    hashes = window_hashes(ids, n, starts=starts, lengths=lengths)
    windows = [
        tuple(ids[s + i : s + i + n].tolist()) for s, m in zip(starts, lengths, strict=True) for i in range(m - n + 1)
    ]
    assert len(hashes) == len(windows)
    by_window = dict(zip(windows, hashes.tolist(), strict=True))
    for w, h in zip(windows, hashes.tolist(), strict=True):
        assert by_window[w] == h
    # collision chance <= 2**-62 per pair for ids < 8 (bound in window_hashes): none expected
    assert len(set(by_window.values())) == len(by_window)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.uint32, np.uint64, np.int64])
def test_pieces_accept_every_id_dtype(dtype: type) -> None:
    """The piecewise path (bucket table, gathers) takes any integer id dtype a split may hold."""
    ids = (np.arange(400) * 7 % 13).astype(dtype)
    whole = count_ngrams(ids, [2, 3], bits=key_bits(13), threads=1, chunk=1 << 30)
    pieces = count_ngrams(ids, [2, 3], bits=key_bits(13), threads=2, chunk=29)
    for k in (2, 3):
        assert np.array_equal(whole[k].keys, pieces[k].keys)
        assert np.array_equal(whole[k].counts, pieces[k].counts)
        assert whole[k].total == 400 - k + 1


def test_merge_counts_equals_counting_the_joined_keys() -> None:
    """merge_counts of two distinct sorted key sets gives the distinct keys of both, sorted, with
    counts added, as sorting and counting the joined keys does."""
    from seqpipe.report.ngrams import merge_counts, runs

    rng = np.random.default_rng(1)
    for _ in range(200):
        a = np.unique(rng.integers(0, 50, int(rng.integers(0, 30))).astype(np.uint64))
        b = np.unique(rng.integers(0, 50, int(rng.integers(0, 30))).astype(np.uint64))
        ca, cb = rng.integers(1, 9, len(a)), rng.integers(1, 9, len(b))
        keys, counts = merge_counts(a, ca, b, cb)
        joined = np.concatenate([a, b])
        order = np.argsort(joined, kind="stable")
        want, _, starts = runs(joined[order])
        want_counts = np.add.reduceat(np.concatenate([ca, cb])[order], starts) if len(want) else np.zeros(0, int)
        assert keys.tolist() == want.tolist() and counts.tolist() == want_counts.tolist()


@settings(max_examples=100, deadline=None)
@given(st.lists(st.integers(0, 50), max_size=60))
def test_distinct_sorted_equals_the_distinct_runs(values: list[int]) -> None:
    """distinct_sorted of a sorted array is its distinct values in order (as numpy's unique gives them)."""
    keys = np.sort(np.array(values, dtype=np.uint64))
    assert distinct_sorted(keys).tolist() == np.unique(keys).tolist()
