"""BatchStream: shifted windows, orders, ranks, workers, resume and the stream fingerprint."""

from __future__ import annotations

import itertools
import random
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest
import xxhash
from hypothesis import given
from hypothesis import strategies as st

from seqpipe.errors import StreamError
from seqpipe.stream import TokenStream
from seqpipe.windows import Batch, BatchStream, StreamState, _Shuffle, stream_fingerprint


def make_stream(
    values: np.ndarray, cuts: list[int] | tuple[int, ...] = (), doc_starts: np.ndarray | None = None
) -> TokenStream:
    edges = [0, *sorted(cuts), len(values)]
    return TokenStream([values[a:b] for a, b in itertools.pairwise(edges)], doc_starts)


@st.composite
def setups(draw: st.DrawFn) -> dict[str, Any]:
    """A small chunked stream of distinct-enough tokens and batch settings."""
    n = draw(st.integers(0, 500))
    values = np.random.default_rng(draw(st.integers(0, 2**32 - 1))).integers(0, 2**31, n).astype(np.uint32)
    cuts = draw(st.lists(st.integers(0, n), max_size=6))
    return {
        "values": values,
        "stream": make_stream(values, cuts),
        "batch_size": draw(st.integers(1, 4)),
        "window": draw(st.integers(1, 12)),
        "order": draw(st.sampled_from(["random", "sequential"])),
        "seed": draw(st.integers(0, 2**40)),
        "keep_last": draw(st.booleans()),
        "stream_key": draw(st.text(max_size=5)),
    }


def build(setup: dict[str, Any], **over: Any) -> BatchStream:
    kw = {k: v for k, v in setup.items() if k != "values"}
    kw.update(over)
    return BatchStream(kw.pop("stream"), **kw)


def round_robin(iterators: list[Iterator[Batch]]) -> list[Batch]:
    """Take one item from each live iterator in turn, as a loader with several workers does."""
    out: list[Batch] = []
    live = list(iterators)
    while live:
        for it in list(live):
            try:
                out.append(next(it))
            except StopIteration:
                live.remove(it)
    return out


def same(a: list[Batch], b: list[Batch]) -> bool:
    return len(a) == len(b) and all(
        x.step == y.step
        and x.fresh == y.fresh
        and np.array_equal(x.inputs, y.inputs)
        and np.array_equal(x.targets, y.targets)
        and np.array_equal(x.starts, y.starts)
        for x, y in zip(a, b, strict=True)
    )


# --- known answers (common practice) ----------------------------------------------------------------


@pytest.mark.parametrize("seed", range(5))
def test_known_answer_sequential_0_to_34(seed: int) -> None:
    """Stream 0..34, B=2, T=5: targets = inputs + 1 and each row continues the previous batch's row."""
    # common practice: sequential (lane) batching for recurrent models
    bs = BatchStream(
        TokenStream([np.arange(35, dtype=np.uint8)]), batch_size=2, window=5, order="sequential", seed=seed
    )
    batches = list(bs)
    lane = (34 - bs.offset) // 2
    assert len(batches) == lane // 5 >= 2
    assert batches[0].inputs[:, 0].tolist() == [bs.offset, bs.offset + lane]
    for k, b in enumerate(batches):
        np.testing.assert_array_equal(b.targets, b.inputs + 1)
        np.testing.assert_array_equal(np.diff(b.inputs, axis=1), 1)  # adjacent in the original sequence
        assert b.fresh == (k == 0)
        if k:
            np.testing.assert_array_equal(b.inputs[:, 0], batches[k - 1].inputs[:, -1] + 1)


@pytest.mark.parametrize("seed", range(5))
def test_known_answer_random_0_to_34(seed: int) -> None:
    """Stream 0..34, B=2, T=5: windows on the offset grid, each once, targets = inputs + 1."""
    # common practice: random offset in [0, T), then floor((N - 1 - offset) / T) windows
    bs = BatchStream(TokenStream([np.arange(35, dtype=np.uint8)]), batch_size=2, window=5, seed=seed, keep_last=True)
    assert 0 <= bs.offset < 5
    count = (34 - bs.offset) // 5
    starts = np.concatenate([b.inputs[:, 0] for b in bs])
    assert sorted(starts.tolist()) == [bs.offset + 5 * k for k in range(count)]
    for b in bs.iter_steps(0, 1):
        np.testing.assert_array_equal(b.targets, b.inputs + 1)
        assert b.fresh


def test_pinned_fingerprints() -> None:
    """A fixed small stream gives fixed fingerprints, so any change in batch order is caught."""
    values = (np.arange(2000) * 7919 % 251).astype(np.uint16)
    stream = make_stream(values, [300, 1200])
    rnd = BatchStream(stream, batch_size=4, window=16, seed=3, stream_key="demo:train")
    seq = BatchStream(stream, batch_size=4, window=16, order="sequential", seed=3, stream_key="demo:train")
    # values computed once with this implementation and pinned
    assert stream_fingerprint(rnd) == "0fd63a48529c119db7f0a24531b6f1e7"
    assert stream_fingerprint(seq) == "1335e648d05da0177c593203a4612be6"


def test_fingerprint_is_xxh3_128_of_little_endian_int64() -> None:
    """stream_fingerprint hashes inputs then targets of each batch as little-endian int64."""
    # reference: xxhash's XXH3-128 (xxhash package, PyPI) over the documented byte layout
    bs = BatchStream(make_stream(np.arange(100, dtype=np.uint16), [40]), batch_size=3, window=4, seed=1)
    h = xxhash.xxh3_128()
    for b in bs.iter_steps(0, 1):
        h.update(b.inputs.astype("<i8").tobytes())
        h.update(b.targets.astype("<i8").tobytes())
    assert stream_fingerprint(bs.iter_steps(0, 1)) == h.hexdigest()
    assert stream_fingerprint([]) == xxhash.xxh3_128().hexdigest()


@pytest.mark.parametrize("dtype", [np.int32, np.uint16, np.dtype(">i8")])
def test_fingerprint_does_not_depend_on_the_batch_dtype(dtype: Any) -> None:
    """Batches of int32, uint16 or big-endian ids fingerprint like the int64 batches of the same stream."""
    stream = make_stream((np.arange(300) * 7 % 251).astype(np.uint16), [120])
    settings: dict[str, Any] = {"batch_size": 3, "window": 5, "seed": 2, "stream_key": "k"}
    wide = BatchStream(stream, **settings)
    narrow = BatchStream(stream, dtype=dtype, **settings)
    assert next(iter(narrow)).inputs.dtype == np.dtype(dtype)
    assert stream_fingerprint(narrow.iter_steps(0, 1)) == stream_fingerprint(wide.iter_steps(0, 1))


# --- identities (hypothesis) ------------------------------------------------------------------------


@given(setups())
def test_windows_are_shifted_slices_inside_the_stream(setup: dict[str, Any]) -> None:
    """Every row is stream[s:s+w] as inputs and stream[s+1:s+w+1] as targets, inside the stream."""
    values = setup["values"]
    for b in build(setup):
        assert b.inputs.dtype == np.int64
        assert b.inputs.shape == b.targets.shape
        width = b.inputs.shape[1]
        for row, s in enumerate(b.starts.tolist()):
            assert s >= 0
            assert s + width + 1 <= len(values)
            np.testing.assert_array_equal(b.inputs[row], values[s : s + width])
            np.testing.assert_array_equal(b.targets[row], values[s + 1 : s + width + 1])


@given(setups())
def test_random_epoch_has_no_repeats_and_the_expected_count(setup: dict[str, Any]) -> None:
    """Random order: no window twice per epoch; floor((N-1-offset)/T) windows in all (common practice)."""
    bs = build(setup, order="random")
    n, t, big = len(setup["values"]), setup["window"], setup["batch_size"]
    count = max(0, (n - 1 - bs.offset) // t)
    starts = [s for b in bs for s in b.starts.tolist()]
    assert len(set(starts)) == len(starts)
    assert all((s - bs.offset) % t == 0 for s in starts)
    if not setup["keep_last"]:
        assert len(starts) == count // big * big
        assert len(bs) == count // big
    else:
        assert sorted(starts) == [bs.offset + k * t for k in range(count)]


@given(setups())
def test_sequential_rows_continue(setup: dict[str, Any]) -> None:
    """Sequential order: row r of batch k+1 starts where row r of batch k ended; lanes are equal."""
    bs = build(setup, order="sequential")
    batches = list(bs)
    for prev, cur in itertools.pairwise(batches):
        np.testing.assert_array_equal(cur.starts, prev.starts + prev.inputs.shape[1])
    if batches:
        lane = bs.lane_length
        assert batches[0].starts.tolist() == [bs.offset + j * lane for j in range(setup["batch_size"])]
        assert sum(b.inputs.shape[1] for b in batches) == (
            lane if setup["keep_last"] else lane // setup["window"] * setup["window"]
        )


@given(setups(), st.integers(1, 3))
def test_ranks_side_by_side_equal_one_process(setup: dict[str, Any], world: int) -> None:
    """w ranks of batch b, concatenated at each step, equal one process with batch w*b."""
    b = setup["batch_size"]
    single = list(build(setup, batch_size=world * b))
    ranks = [list(build(setup, rank=r, world_size=world)) for r in range(world)]
    assert all(len(r) == len(single) for r in ranks)
    for k, whole in enumerate(single):
        np.testing.assert_array_equal(np.concatenate([r[k].inputs for r in ranks]), whole.inputs)
        np.testing.assert_array_equal(np.concatenate([r[k].targets for r in ranks]), whole.targets)
        sizes = [len(r[k].starts) for r in ranks]
        assert max(sizes) - min(sizes) <= 1  # a partial last batch is split as evenly as possible


@given(setups(), st.integers(1, 4), st.integers(0, 5))
def test_worker_interleave_equals_one_worker(setup: dict[str, Any], workers: int, start: int) -> None:
    """Round-robin over iter_steps(i, n) reproduces the single-worker stream from any start step."""
    probe = build(setup)
    start = min(start, len(probe))
    bs = build(setup, start_step=start)
    one = list(bs.iter_steps(0, 1))
    assert same(round_robin([bs.iter_steps(i, workers) for i in range(workers)]), one)
    assert [b.step for b in one] == list(range(start, len(bs)))


@given(setups(), st.integers(0, 6))
def test_resume_yields_the_remaining_batches(setup: dict[str, Any], consumed: int) -> None:
    """State saved after k batches, sent through a dict, resumes to exactly the remaining batches."""
    full = list(build(setup))
    bs = build(setup)
    it = iter(bs)
    taken = [b for _, b in zip(range(consumed), it, strict=False)]
    state = StreamState.from_dict(dict(bs.state().to_dict()))
    assert state.step == len(taken)
    resumed = build(setup).resume(state)
    assert same(list(resumed), full[len(taken) :])
    assert same(list(build(setup, start_step=len(taken))), full[len(taken) :])


# --- the epoch permutation -------------------------------------------------------------------------


@given(st.integers(0, 3000), st.integers(0, 2**64 - 1))
def test_shuffle_is_a_bijection(n: int, seed: int) -> None:
    """The keyed Feistel permutation maps [0, n) onto itself for any n, cycle walking included."""
    perm = _Shuffle(n, np.random.Generator(np.random.PCG64(seed)))(np.arange(n, dtype=np.int64))
    assert perm.dtype == np.int64
    np.testing.assert_array_equal(np.sort(perm), np.arange(n))


def test_shuffle_looks_uniform() -> None:
    """Over 300 keys: about 1 fixed point and mean displacement about n/3, as for uniform permutations."""
    # common practice (elementary probability): a uniform random permutation of n has 1 fixed point
    # on average, and E|p(i) - i| = (n^2 - 1) / (3n)
    n = 1000
    fixed, shift = [], []
    for seed in range(300):
        perm = _Shuffle(n, np.random.Generator(np.random.PCG64(seed)))(np.arange(n, dtype=np.int64))
        fixed.append(int((perm == np.arange(n)).sum()))
        shift.append(float(np.abs(perm - np.arange(n)).mean()))
    assert 0.75 < np.mean(fixed) < 1.25  # the mean of 300 has standard error about 0.06
    assert abs(np.mean(shift) - (n * n - 1) / (3 * n)) < 5


@given(st.integers(2, 3000), st.integers(0, 2**64 - 1))
def test_cycle_walk_with_python_ints_equals_vectorized_passes(n: int, seed: int) -> None:
    """The few windows left outside [0, n) are walked with Python ints; the result equals walking
    every one with the uint64 array rounds (and the map stays a bijection)."""
    import seqpipe.windows as windows_module

    def perm(few: int) -> np.ndarray:
        old = windows_module._FEW_OUTSIDE
        windows_module._FEW_OUTSIDE = few
        try:
            return _Shuffle(n, np.random.Generator(np.random.PCG64(seed)))(np.arange(n, dtype=np.int64))
        finally:
            windows_module._FEW_OUTSIDE = old

    shuffle = _Shuffle(n, np.random.Generator(np.random.PCG64(seed)))
    x = np.arange(int(shuffle.a) * int(shuffle.b), dtype=np.uint64)  # one pass over the whole square
    assert [shuffle._encrypt_int(v) for v in x.tolist()] == shuffle._encrypt(x).tolist()
    vectorized, by_ints = perm(0), perm(n)  # 0: every pass vectorized; n: every walk in Python ints
    np.testing.assert_array_equal(by_ints, vectorized)
    np.testing.assert_array_equal(perm(windows_module._FEW_OUTSIDE), vectorized)
    np.testing.assert_array_equal(np.sort(by_ints), np.arange(n))


@given(st.integers(40, 3000), st.integers(0, 2**32), st.sampled_from(["random", "documents"]), st.data())
def test_windows_at_equals_window_starts(n: int, seed: int, order: str, data: st.DataObject) -> None:
    """windows_at(index) gives entry k = window_starts(index[k], 1)[0] for any index set, in the order given."""
    stream = TokenStream([np.arange(n, dtype=np.int64)], doc_starts=np.arange(0, n, 7))
    bs = BatchStream(stream, batch_size=2, window=3, seed=seed, order=order, epoch=1, stream_key="k")
    total = bs.num_windows
    index = np.asarray(data.draw(st.lists(st.integers(0, total - 1), max_size=60)), np.int64)
    expected = [int(bs.window_starts(int(i), 1)[0]) for i in index.tolist()]
    fresh = BatchStream(stream, batch_size=2, window=3, seed=seed, order=order, epoch=1, stream_key="k")
    assert fresh.windows_at(index).tolist() == expected
    with pytest.raises(StreamError, match="index"):
        fresh.windows_at(np.asarray([total], np.int64))


def test_the_kept_generator_gives_the_keys_a_fresh_one_gives() -> None:
    """The permutation keys drawn from the generator kept after the offset draw equal those drawn
    from a new generator that replays the offset draw (the path a second thread takes)."""
    stream = TokenStream([np.arange(50_000, dtype=np.int64)])
    kept = BatchStream(stream, batch_size=4, window=7, seed=11, epoch=2, stream_key="k")
    replayed = BatchStream(stream, batch_size=4, window=7, seed=11, epoch=2, stream_key="k")
    replayed._key_draws.clear()
    assert kept.offset == replayed.offset
    np.testing.assert_array_equal(
        kept.window_starts(0, kept.num_windows), replayed.window_starts(0, replayed.num_windows)
    )


def test_large_split_resume_is_direct() -> None:
    """A far step of a 10^9-token stream is computed directly, and equals the same step via pages."""
    # 10^9 tokens of zeros cost no memory: one broadcast view, never materialised
    huge = TokenStream([np.broadcast_to(np.zeros(1, np.uint16), (10**9,))])
    bs = BatchStream(huge, batch_size=8, window=128, seed=2, stream_key="k")
    far = len(bs) - 1
    starts, _ = bs.starts_for(far)
    again = BatchStream(huge, batch_size=8, window=128, seed=2, stream_key="k").resume(StreamState(0, far))
    np.testing.assert_array_equal(next(iter(again)).starts, starts)
    assert ((starts - bs.offset) % 128 == 0).all()
    assert (starts + 129 <= 10**9).all()


# --- seeds, epochs, keys ----------------------------------------------------------------------------


def fp(**kw: Any) -> str:
    values = (np.arange(5000) * 31 % 1009).astype(np.uint16)
    base: dict[str, Any] = {"batch_size": 4, "window": 8, "seed": 0, "stream_key": "k"}
    base.update(kw)
    return stream_fingerprint(BatchStream(make_stream(values, [1234]), **base))


def test_random_order_depends_on_seed_epoch_and_key() -> None:
    """Same (key, seed, epoch) -> same stream; a different seed, epoch or key -> a different one."""
    assert fp() == fp()
    assert len({fp(), fp(seed=1), fp(epoch=1), fp(stream_key="other")}) == 4


def test_sequential_offset_depends_on_seed() -> None:
    """Sequential order: the stream is a pure function of the seed, and seeds move the lane offset."""
    values = np.arange(3000, dtype=np.uint16)
    by_seed = {
        s: BatchStream(TokenStream([values]), batch_size=2, window=16, order="sequential", seed=s) for s in range(12)
    }
    assert len({bs.offset for bs in by_seed.values()}) > 1
    assert all(0 <= bs.offset < 16 for bs in by_seed.values())
    ref = stream_fingerprint(by_seed[0].iter_steps(0, 1))
    for bs in by_seed.values():
        # the offset is the only random draw in this order: equal offsets, equal streams
        assert (stream_fingerprint(bs.iter_steps(0, 1)) == ref) == (bs.offset == by_seed[0].offset)
    assert fp(order="sequential", seed=5) == fp(order="sequential", seed=5)


def test_global_random_state_untouched() -> None:
    """Building and reading a stream neither reads nor moves numpy's or Python's global generator."""
    np_state, py_state = np.random.get_state(), random.getstate()
    list(BatchStream(TokenStream([np.arange(500, dtype=np.uint16)]), batch_size=3, window=7, seed=9))
    after = np.random.get_state()
    assert np.array_equal(np_state[1], after[1])
    assert np_state[2:] == after[2:]
    assert random.getstate() == py_state


# --- details ----------------------------------------------------------------------------------------


def test_partial_last_batch_split_across_ranks() -> None:
    """keep_last=True, random order: 5 leftover windows over 3 ranks give them 2, 2 and 1 rows."""
    stream = TokenStream([np.arange(100, dtype=np.uint16)])
    probe = BatchStream(stream, batch_size=2, window=9, world_size=3, keep_last=True, seed=4)
    windows = probe.num_windows  # 10 or 11 windows of 9; global batch 6 -> a partial batch remains
    left = windows % 6
    assert left
    sizes = [
        len(
            BatchStream(stream, batch_size=2, window=9, world_size=3, rank=r, keep_last=True, seed=4)
            .batch(len(probe) - 1)
            .starts
        )
        for r in range(3)
    ]
    assert sizes == [left // 3 + (r < left % 3) for r in range(3)]


def test_sequential_keeps_a_narrow_tail_with_keep_last() -> None:
    """Sequential, keep_last=True: the last batch holds the lane remainder, narrower than T."""
    stream = TokenStream([np.arange(60, dtype=np.uint16)])
    bs = BatchStream(stream, batch_size=2, window=8, order="sequential", keep_last=True, seed=2)
    widths = [b.inputs.shape[1] for b in bs]
    assert sum(widths) == bs.lane_length
    assert widths[:-1] == [8] * (len(widths) - 1)
    assert 0 < widths[-1] <= 8


def test_boundary_mask_and_fresh() -> None:
    """With boundaries=True the mask marks targets that open a document; fresh follows the order."""
    docs = np.array([0, 13, 14, 40, 77])
    stream = TokenStream([np.arange(50, dtype=np.uint16), np.arange(50, 100, dtype=np.uint16)], docs)
    for order in ("random", "sequential"):
        bs = BatchStream(stream, batch_size=3, window=6, order=order, boundaries=True, seed=5)
        for b in bs:
            assert b.mask is not None
            assert b.mask.shape == b.inputs.shape
            expected = np.isin(b.starts[:, None] + np.arange(1, 7), docs)
            np.testing.assert_array_equal(b.mask, expected)
            assert b.fresh == (order == "random" or b.step == 0)
    assert BatchStream(stream, batch_size=1, window=4).batch(0).mask is None


@given(setups())
def test_inputs_and_targets_are_separate_c_contiguous_arrays(setup: dict[str, Any]) -> None:
    """Every batch hands out C-contiguous inputs and targets that do not overlap (reshapable in place)."""
    for b in build(setup):
        for arr in (b.inputs, b.targets):
            assert arr.flags.c_contiguous
            assert np.shares_memory(arr.reshape(-1), arr)  # flattening is a view, not a copy
        assert not np.shares_memory(b.inputs, b.targets)


def test_output_dtype_and_state_tracking() -> None:
    """dtype sets the batch id type; state() advances with each batch handed out."""
    bs = BatchStream(
        TokenStream([np.arange(200, dtype=np.uint16)]), batch_size=2, window=5, dtype=np.int32, start_step=1
    )
    it = iter(bs)
    first = next(it)
    assert first.inputs.dtype == np.int32
    assert first.step == 1
    next(it)
    assert bs.state().step == 3
    assert bs.state().epoch == 0
    assert bs.state_after(first) == StreamState(0, 2, bs.config)
    nxt = bs.next_epoch()
    assert nxt.epoch == 1
    assert nxt.state().step == 0


def test_short_stream_has_no_batches() -> None:
    """A stream shorter than one batch yields nothing (length 0) instead of failing."""
    for n in (0, 1, 5):
        stream = TokenStream([np.arange(n, dtype=np.uint16)])
        for order in ("random", "sequential"):
            assert list(BatchStream(stream, batch_size=4, window=8, order=order)) == []


def test_bad_parameters_name_the_key() -> None:
    """Invalid settings raise StreamError whose message names the parameter and value."""
    stream = TokenStream([np.arange(100, dtype=np.uint16)])
    cases: list[tuple[dict[str, Any], str]] = [
        ({"batch_size": 0}, "batch_size"),
        ({"window": -1}, "window"),
        ({"order": "shuffled"}, "order"),
        ({"rank": 2, "world_size": 2}, "rank"),
        ({"seed": -1}, "seed"),
        ({"dtype": np.int8}, "dtype"),
        ({"dtype": np.float64}, "dtype"),
        ({"boundaries": True}, "boundaries"),
        ({"start_step": 10**6}, "start_step"),
        ({"keep_last": 1}, "keep_last"),
    ]
    for over, needle in cases:
        kw: dict[str, Any] = {"batch_size": 2, "window": 4}
        kw.update(over)
        with pytest.raises(StreamError, match=needle):
            BatchStream(stream, **kw)
    bs = BatchStream(stream, batch_size=2, window=4)
    with pytest.raises(StreamError, match="step"):
        bs.batch(len(bs))
    with pytest.raises(StreamError, match="worker_id"):
        next(bs.iter_steps(3, 2))


def test_state_validation_and_foreign_states() -> None:
    """StreamState round-trips; bad dicts, foreign configs and steps past the end are refused."""
    s = StreamState(epoch=2, step=5, config="abc")
    assert StreamState.from_dict(s.to_dict()) == s
    for bad, needle in [
        ({"epoch": 0, "step": 0, "extra": 1}, "extra"),
        ({"epoch": -1, "step": 0}, "epoch"),
        ({"epoch": 0}, "step"),
        ({"epoch": 0, "step": "3"}, "step"),
    ]:
        with pytest.raises(StreamError, match=needle):
            StreamState.from_dict(bad)
    stream = TokenStream([np.arange(300, dtype=np.uint16)])
    bs = BatchStream(stream, batch_size=2, window=5, seed=1)
    other = BatchStream(stream, batch_size=2, window=5, seed=2)
    with pytest.raises(StreamError, match="different"):
        bs.resume(other.state())
    with pytest.raises(StreamError, match="past"):
        bs.resume(StreamState(0, len(bs) + 1))
    assert list(bs.resume(StreamState(0, len(bs)))) == []
    assert bs.resume(StreamState(3, 2)).epoch == 3
