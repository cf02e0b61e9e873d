"""Merging per-part count tables (seqpipe/counts.py) and first occurrences of document keys."""

from __future__ import annotations

import collections
import random

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqpipe.counts import CountMerger, first_occurrence
from seqpipe.errors import SeqpipeError


@settings(max_examples=60, deadline=None)
@given(
    parts=st.lists(
        st.dictionaries(st.binary(min_size=1, max_size=3), st.integers(1, 50), max_size=12), min_size=1, max_size=20
    ),
    order_seed=st.integers(0, 1000),
    batch=st.integers(1, 9),
    announce=st.booleans(),
)
def test_count_merger_equals_a_counter_whatever_the_arrival_order(
    parts: list[dict[bytes, int]], order_seed: int, batch: int, announce: bool
) -> None:
    """Partial counts merged as they arrive, in any order and fold rhythm, give the sums a
    ``collections.Counter`` gives, in first-occurrence order (the part's position, then the
    key's position within it: the ``first`` rank that count tables carry)."""
    tables = []
    for order, part in enumerate(parts):
        keys = list(part)
        tables.append(
            pa.table(
                {
                    "key": pa.array(keys, pa.binary()),
                    "count": pa.array([part[k] for k in keys], pa.int64()),
                    "first": pa.array([(order << 40) + j for j in range(len(keys))], pa.int64()),
                }
            )
        )
    if not any(parts):
        return
    want: collections.Counter[bytes] = collections.Counter()
    first_seen: list[bytes] = []
    for part in parts:
        for k, c in part.items():
            if k not in want:
                first_seen.append(k)
            want[k] += c
    merger = CountMerger(batch=batch)
    if announce:
        merger.expect(len(tables))
    arrival = list(range(len(tables)))
    random.Random(order_seed).shuffle(arrival)
    for i in arrival:
        merger.add((tables[i], 1))
    got = merger.result()
    assert got.column("key").to_pylist() == first_seen
    assert got.column("count").to_pylist() == [want[k] for k in first_seen]
    assert merger.train_documents == len(tables)


def test_count_merger_with_no_table_refuses() -> None:
    """A merger that received no table raises SeqpipeError instead of returning an empty count."""
    with pytest.raises(SeqpipeError, match="nothing to count"):
        CountMerger().result()


def test_count_merger_holds_at_most_a_batch_of_pending_tables() -> None:
    """Tables fold into the total once ``batch`` are pending, so the driver never holds more."""
    merger = CountMerger(batch=3)
    table = pa.table({"key": [b"a"], "count": pa.array([1], pa.int64()), "first": pa.array([0], pa.int64())})
    for _ in range(10):
        merger.add((table, 0))
        assert len(merger.pending) < 3
    assert merger.result().column("count").to_pylist() == [10]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 5), max_size=40))
def test_first_occurrence_marks_each_key_once_at_its_first_row(labels: list[int]) -> None:
    """first_occurrence is True exactly at the first row of each distinct 16-byte key."""
    keys = np.zeros((len(labels), 16), np.uint8)
    keys[:, 3] = labels  # keys differing in one byte
    want = [labels.index(v) == i for i, v in enumerate(labels)]
    assert first_occurrence(keys).tolist() == want


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 3)), max_size=40), st.integers(0, 7), st.integers(8, 15))
def test_first_occurrence_compares_all_16_bytes(labels: list[tuple[int, int]], low: int, high: int) -> None:
    """Keys that differ only in a byte of the first half, only in one of the second, or in
    both: each distinct key is kept once, at its first row (checked against a plain dict of the
    keys' bytes, common practice)."""
    keys = np.zeros((len(labels), 16), np.uint8)
    keys[:, low] = [a for a, _ in labels]
    keys[:, high] = [b for _, b in labels]
    seen: dict[bytes, int] = {}
    for i, row in enumerate(keys):
        seen.setdefault(row.tobytes(), i)
    want = [seen[row.tobytes()] == i for i, row in enumerate(keys)]
    assert first_occurrence(keys).tolist() == want
    assert first_occurrence(keys[::-1]).tolist() == first_occurrence(keys[::-1].copy()).tolist()  # a strided view
