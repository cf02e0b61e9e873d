"""TokenStream: one logical stream over chunks, checked against numpy on the concatenated array."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from seqpipe.errors import SeqpipeError, StreamError
from seqpipe.shards import read_shard, write_shard
from seqpipe.stream import TokenStream


def split_at(values: np.ndarray, cuts: list[int]) -> list[np.ndarray]:
    """``values`` cut at the given (unsorted, possibly repeated) positions: empty chunks included."""
    edges = [0, *sorted(cuts), len(values)]
    return [values[a:b] for a, b in itertools.pairwise(edges)]


@st.composite
def chunked(draw: st.DrawFn, min_size: int = 1) -> tuple[np.ndarray, list[np.ndarray]]:
    n = draw(st.integers(min_size, 300))
    seed = draw(st.integers(0, 2**32 - 1))
    values = np.random.default_rng(seed).integers(0, 60000, n).astype(np.uint16)
    cuts = draw(st.lists(st.integers(0, n), max_size=8))
    return values, split_at(values, cuts)


def test_lengths_offsets_and_no_copy() -> None:
    """len, dtype and chunk_offsets follow the chunks, which are kept as given (not copied)."""
    a, b, c = np.arange(5, dtype=np.uint32), np.arange(0, dtype=np.uint32), np.arange(7, dtype=np.uint32)
    s = TokenStream([a, b, c])
    assert len(s) == 12
    assert s.dtype == np.uint32
    assert s.chunk_offsets.tolist() == [0, 5, 5, 12]
    assert s.chunk_offsets.dtype == np.int64
    assert all(x is y for x, y in zip(s.chunks, (a, b, c), strict=True))
    assert s.doc_starts is None


@given(chunked(), st.data())
def test_gather_matches_numpy_slicing(case: tuple[np.ndarray, list[np.ndarray]], data: st.DataObject) -> None:
    """gather rows equal slices of the concatenated array, across chunk edges and empty chunks."""
    # reference: numpy slicing of np.concatenate(chunks) (numpy, PyPI)
    values, chunks = case
    s = TokenStream(chunks)
    length = data.draw(st.integers(0, len(values)))
    starts = np.array(data.draw(st.lists(st.integers(0, len(values) - length), max_size=20)), dtype=np.int64)
    out = s.gather(starts, length)
    assert out.shape == (len(starts), length)
    assert out.dtype == np.int64
    expected = np.zeros((len(starts), length), dtype=np.int64)
    for row, i in enumerate(starts.tolist()):
        expected[row] = values[i : i + length]
    np.testing.assert_array_equal(out, expected)


@given(chunked(), st.data())
def test_slice_matches_numpy(case: tuple[np.ndarray, list[np.ndarray]], data: st.DataObject) -> None:
    """slice(a, b) equals the concatenated array's [a:b] in the stream dtype."""
    values, chunks = case
    s = TokenStream(chunks)
    a = data.draw(st.integers(0, len(values)))
    b = data.draw(st.integers(a, len(values)))
    got = s.slice(a, b)
    assert got.dtype == np.uint16
    np.testing.assert_array_equal(got, values[a:b])


def test_gather_out_dtype_single_and_multi_chunk() -> None:
    """out_dtype is honoured both when one chunk holds every row and when rows spread out."""
    one = TokenStream([np.arange(100, dtype=np.uint16)])
    many = TokenStream(split_at(np.arange(100, dtype=np.uint16), [10, 50, 51, 90]))
    for s in (one, many):
        for dt in (np.int64, np.int32, np.uint16):
            got = s.gather(np.array([2, 40, 80, 95]), 5, out_dtype=dt)
            assert got.dtype == dt
            np.testing.assert_array_equal(got, np.array([2, 40, 80, 95])[:, None] + np.arange(5))


def test_gather_out_of_range_raises() -> None:
    """Windows that leave the stream are refused with StreamError, not an IndexError."""
    s = TokenStream([np.arange(10, dtype=np.uint8), np.arange(10, dtype=np.uint8)])
    with pytest.raises(StreamError, match="outside the stream"):
        s.gather(np.array([16]), 5)
    with pytest.raises(StreamError, match="outside the stream"):
        s.gather(np.array([-1]), 2)
    with pytest.raises(StreamError, match="length"):
        s.gather(np.array([0]), -1)
    with pytest.raises(StreamError, match="outside"):
        s.slice(5, 21)
    assert s.gather(np.array([15]), 5).tolist() == [[5, 6, 7, 8, 9]]


def test_bad_chunks_and_doc_starts_raise() -> None:
    """Mixed dtypes, non-integer or 2-D chunks, unsorted or out-of-range doc_starts are refused."""
    with pytest.raises(StreamError, match="dtype"):
        TokenStream([np.zeros(3, np.uint16), np.zeros(3, np.uint32)])
    with pytest.raises(StreamError, match="integer"):
        TokenStream([np.zeros(3, np.float32)])
    with pytest.raises(StreamError, match="1-D"):
        TokenStream([np.zeros((2, 2), np.uint16)])
    with pytest.raises(StreamError, match="sorted"):
        TokenStream([np.zeros(10, np.uint16)], doc_starts=np.array([0, 5, 3]))
    with pytest.raises(StreamError, match="doc_starts"):
        TokenStream([np.zeros(10, np.uint16)], doc_starts=np.array([0, 11]))
    assert issubclass(StreamError, SeqpipeError)


def test_empty_stream() -> None:
    """A stream with no chunks has length 0, the given dtype, and gathers nothing."""
    s = TokenStream([], dtype=np.uint16)
    assert len(s) == 0
    assert s.dtype == np.uint16
    assert s.gather(np.zeros(0, np.int64), 4).shape == (0, 4)
    with pytest.raises(StreamError):
        s.gather(np.array([0]), 1)


@given(chunked(min_size=2), st.data())
def test_boundary_mask_matches_brute_force(case: tuple[np.ndarray, list[np.ndarray]], data: st.DataObject) -> None:
    """mask[i, j] is True exactly when token start+j+1 is a document start."""
    values, chunks = case
    n = len(values)
    docs = sorted(set(data.draw(st.lists(st.integers(0, n - 1), max_size=15))) | {0})
    s = TokenStream(chunks, doc_starts=np.array(docs))
    length = data.draw(st.integers(1, n))
    starts = np.array(data.draw(st.lists(st.integers(0, n - length), max_size=10)), dtype=np.int64)
    mask = s.boundary_mask(starts, length)
    doc_set = set(docs)
    expected = np.array(
        [[st_ + j + 1 in doc_set for j in range(length - 1)] for st_ in starts.tolist()], dtype=bool
    ).reshape(len(starts), length - 1)
    np.testing.assert_array_equal(mask, expected)


def test_boundary_mask_known_answer() -> None:
    """Documents [0,4) [4,9) [9,12): a window from 2 of 8 tokens crosses at targets 4 and 9."""
    s = TokenStream([np.arange(12, dtype=np.uint8)], doc_starts=np.array([0, 4, 9]))
    # inputs 2..8, targets 3..9: target 4 (j=1) and target 9 (j=6) begin new documents
    assert s.boundary_mask(np.array([2]), 8).tolist() == [[False, True, False, False, False, False, True]]
    with pytest.raises(StreamError, match="doc_starts"):
        TokenStream([np.arange(12, dtype=np.uint8)]).boundary_mask(np.array([0]), 3)


def test_memory_mapped_shards(tmp_path: Path) -> None:
    """Over shards read back memory-mapped, chunks stay zero-copy views and gather is exact."""
    rng = np.random.default_rng(7)
    parts = [rng.integers(0, 65535, n).astype(np.uint16) for n in (1000, 17, 2500)]
    chunks = []
    for i, p in enumerate(parts):
        path = tmp_path / f"{i:06d}.arrow"
        write_shard(path, p)
        chunks.append(read_shard(path, dtype=np.dtype(np.uint16)))
    s = TokenStream(chunks)
    assert all(c is d for c, d in zip(s.chunks, chunks, strict=True))
    assert not any(c.flags.owndata for c in s.chunks)  # views of the mapped file, not copies
    whole = np.concatenate(parts)
    starts = rng.integers(0, len(whole) - 300, 50)
    np.testing.assert_array_equal(s.gather(starts, 300), whole[starts[:, None] + np.arange(300)])


def test_pickle_round_trip_leaves_the_view_cache_behind() -> None:
    """A pickled stream (as sent to spawned loader workers) carries the tokens once, not its views."""
    import pickle

    values = np.arange(20_000, dtype=np.uint16)
    s = TokenStream(split_at(values, [5000]), doc_starts=np.array([0, 7000]))
    s.gather(np.array([10, 4990, 9000]), 512)  # fills the window-view cache
    data = pickle.dumps(s)
    assert len(data) < 2 * values.nbytes  # a pickled view would copy each chunk ~512-fold
    back = pickle.loads(data)
    assert len(back) == len(s)
    assert back.dtype == s.dtype
    np.testing.assert_array_equal(back.doc_starts, s.doc_starts)
    np.testing.assert_array_equal(back.gather(np.array([4990]), 20), s.gather(np.array([4990]), 20))
