"""Positions within documents, documents as rows, and the exact evaluation pass."""

from __future__ import annotations

import itertools
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqpipe.dataset import open_dataset
from seqpipe.errors import StreamError
from seqpipe.rows import PositionPage, attention_mask, row_positions
from seqpipe.stream import TokenStream
from seqpipe.windows import Batch, BatchStream, StreamState

PAD = 2**31 + 7  # no token of the test streams has this id (token values are their offsets)


@st.composite
def setups(draw: st.DrawFn) -> dict[str, Any]:
    """A chunked stream whose token values are their offsets, documents (some empty) and sizes."""
    n = draw(st.integers(0, 300))
    starts = sorted(draw(st.lists(st.integers(0, n), max_size=25)))
    if draw(st.booleans()):
        starts = [0, *starts]
    cuts = sorted(draw(st.lists(st.integers(0, n), max_size=5)))
    edges = [0, *cuts, n]
    values = np.arange(n, dtype=np.uint32)
    stream = TokenStream([values[a:b] for a, b in itertools.pairwise(edges)], np.array(starts, dtype=np.int64))
    return {
        "stream": stream,
        "n": n,
        "batch_size": draw(st.integers(1, 4)),
        "window": draw(st.integers(1, 10)),
        "seed": draw(st.integers(0, 2**32)),
    }


def doc_starts_of(setup: dict[str, Any]) -> np.ndarray:
    """Distinct document starts, with 0 first (tokens before the first listed start form a document)."""
    ds = setup["stream"].doc_starts
    return np.unique(np.concatenate([[0], ds])).astype(np.int64)


def make(setup: dict[str, Any], **over: Any) -> BatchStream:
    kw: dict[str, Any] = {k: setup[k] for k in ("batch_size", "window", "seed")}
    kw.update(over)
    return BatchStream(setup["stream"], stream_key="k", **kw)


def all_batches(bs: BatchStream) -> list[Batch]:
    return [bs.batch(k) for k in range(len(bs))]


def check_positions(batch: Batch, ds: np.ndarray, pad: int | None = None) -> None:
    """doc_position = offset - start of the offset's document; doc_index counts document starts along the row."""
    assert batch.doc_index is not None and batch.doc_position is not None
    for r in range(len(batch.inputs)):
        row = batch.inputs[r].astype(np.int64)
        real = row != pad if pad is not None else np.ones(len(row), bool)
        if not real.any():
            continue
        offsets = row[real]
        doc = np.searchsorted(ds, offsets, side="right") - 1
        np.testing.assert_array_equal(batch.doc_position[r][real], offsets - ds[doc])
        np.testing.assert_array_equal(batch.doc_index[r][real], doc - doc[0])
        assert (batch.doc_index[r][~real] == -1).all() and (batch.doc_position[r][~real] == 0).all()


# --- positions ----------------------------------------------------------------------------------------


@settings(max_examples=40)  # each example reads every batch of several streams
@given(setups(), st.sampled_from(["random", "sequential"]), st.integers(1, 3), st.integers(0, 5))
def test_window_positions_follow_the_document_offsets(setup: dict[str, Any], order: str, world: int, at: int) -> None:
    """Every rank's rows, and a resumed stream's, carry positions consistent with the document starts."""
    ds = doc_starts_of(setup)
    for rank in range(world):
        bs = make(setup, order=order, rank=rank, world_size=world, positions=True, keep_last=True)
        batches = all_batches(bs)
        for b in batches:
            check_positions(b, ds)
        step = min(at, len(bs))
        resumed = list(bs.resume(StreamState(epoch=0, step=step, config=bs.config)))
        for a, b in zip(batches[step:], resumed, strict=True):
            np.testing.assert_array_equal(a.doc_index, b.doc_index)
            np.testing.assert_array_equal(a.doc_position, b.doc_position)
        workers = [b for i in range(2) for b in bs.iter_steps(i, 2)]
        for b in workers:
            np.testing.assert_array_equal(b.doc_position, batches[b.step].doc_position)


@settings(max_examples=30)
@given(setups(), st.randoms(use_true_random=False))
def test_positions_do_not_depend_on_the_order_steps_are_asked(setup: dict[str, Any], rnd: Any) -> None:
    """Steps asked in order (found a page of batches at a time), every other one, or shuffled give the same arrays."""
    in_order = all_batches(make(setup, positions=True, keep_last=True))
    steps = list(range(len(in_order)))
    rnd.shuffle(steps)
    for asked in (steps, [*range(0, len(steps), 2), *range(1, len(steps), 2)]):
        bs = make(setup, positions=True, keep_last=True)
        for k in asked:
            b = bs.batch(k)
            np.testing.assert_array_equal(b.doc_index, in_order[k].doc_index)
            np.testing.assert_array_equal(b.doc_position, in_order[k].doc_position)


@pytest.mark.parametrize("dtype", [np.int64, np.int32])
def test_position_pages_equal_the_plain_bisection(dtype: type) -> None:
    """PositionPage over several batches, int64 or int32 starts, equals row_positions per batch, also
    for rows holding more document starts than the page reads by gather (short documents)."""
    rng = np.random.default_rng(11)
    for high in (2, 6, 40, 900):  # documents of 1..high-1 tokens: many or few starts per row
        lengths = rng.integers(1, high, 400)
        ds = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
        width, rows, batches = 24, 5, 4
        starts = rng.integers(0, int(lengths.sum()) - width, rows * batches)
        page = PositionPage.of(ds.astype(dtype), starts, rows, width)
        assert page.batches == batches
        for k in range(batches):
            cells = starts[k * rows : (k + 1) * rows, None] + np.arange(width)
            want_index, want_position = row_positions(ds, cells)
            got_index, got_position = page.take(k)
            np.testing.assert_array_equal(got_index, want_index)
            np.testing.assert_array_equal(got_position, want_position)
            assert got_index.dtype == got_position.dtype == np.int64


@given(setups())
def test_positions_leave_the_tokens_unchanged(setup: dict[str, Any]) -> None:
    """Asking for positions adds fields only: the tokens are those of the stream without them."""
    plain, with_pos = make(setup, keep_last=True), make(setup, keep_last=True, positions=True)
    for a, b in zip(all_batches(plain), all_batches(with_pos), strict=True):
        assert a.doc_index is None and a.doc_position is None
        np.testing.assert_array_equal(a.inputs, b.inputs)
        np.testing.assert_array_equal(a.targets, b.targets)


def test_positions_known_answer() -> None:
    """Documents at 0, 4 and 9 of 0..11: a window from 2 reads positions 2,3,0,1,2,3,4,0 in documents 0,0,1,..,2."""
    stream = TokenStream([np.arange(12, dtype=np.uint8)], np.array([0, 4, 9]))
    bs = BatchStream(stream, batch_size=1, window=8, order="evaluation", positions=True, stride=8)
    # hand-computed from the definition
    b = bs.batch(0)
    assert b.doc_index is not None and b.doc_position is not None
    assert b.doc_position[0].tolist() == [0, 1, 2, 3, 0, 1, 2, 3]
    assert b.doc_index[0].tolist() == [0, 0, 0, 0, 1, 1, 1, 1]
    last = bs.batch(1)  # starts at 8: tokens 8..11, then padding
    assert last.doc_position is not None and last.doc_index is not None
    assert last.doc_position[0].tolist() == [4, 0, 1, 2, 0, 0, 0, 0]
    assert last.doc_index[0].tolist() == [0, 1, 1, 1, -1, -1, -1, -1]


def test_attention_mask_is_block_diagonal() -> None:
    """Causal: same document and key not after query; non-causal: same document; batches keep their shape."""
    doc = np.array([0, 0, 1, 1, 1])
    # hand-written expected matrices
    causal = np.array(
        [
            [1, 0, 0, 0, 0],
            [1, 1, 0, 0, 0],
            [0, 0, 1, 0, 0],
            [0, 0, 1, 1, 0],
            [0, 0, 1, 1, 1],
        ],
        dtype=bool,
    )
    np.testing.assert_array_equal(attention_mask(doc), causal)
    full = np.array([[1, 1, 0, 0, 0], [1, 1, 0, 0, 0], [0, 0, 1, 1, 1], [0, 0, 1, 1, 1], [0, 0, 1, 1, 1]], dtype=bool)
    np.testing.assert_array_equal(attention_mask(doc, causal=False), full)
    batch = attention_mask(np.stack([doc, np.zeros(5, np.int64)]))
    assert batch.shape == (2, 5, 5)
    np.testing.assert_array_equal(batch[1], np.tri(5, dtype=bool))
    with pytest.raises(StreamError, match="doc_index"):
        attention_mask(np.zeros(3, dtype=float))


# --- documents as rows -------------------------------------------------------------------------------


def real_targets(batches: list[Batch]) -> list[int]:
    out: list[int] = []
    for b in batches:
        assert b.loss_mask is not None
        out.extend(b.targets[b.loss_mask].astype(np.int64).tolist())
    return out


@settings(max_examples=40)
@given(setups(), st.integers(1, 3), st.integers(0, 3), st.booleans())
def test_document_rows_cover_the_split_once(setup: dict[str, Any], world: int, group: int, cont: bool) -> None:
    """Rows start at a document start or continue the previous piece; padding only at row ends; every
    target once per epoch; every document start once as a row's first input."""
    ds = doc_starts_of(setup)
    n, t = setup["n"], setup["window"]
    opts = {"order": "documents", "pad_id": PAD, "keep_last": True, "group_lengths": group, "positions": True}
    batches = [b for r in range(world) for b in all_batches(make(setup, rank=r, world_size=world, **opts))]
    firsts: list[int] = []
    for b in batches:
        assert b.loss_mask is not None
        check_positions(b, ds, PAD)
        for r in range(len(b.inputs)):
            row = np.append(b.inputs[r], b.targets[r][-1]).astype(np.int64)
            real = row != PAD
            k = int(real.sum())
            assert real[:k].all() and not real[k:].any()  # padding only at the end
            assert k >= 1 and b.loss_mask[r].sum() == k - 1
            doc = np.searchsorted(ds, row[:k], side="right") - 1
            assert (doc == doc[0]).all() and (np.diff(row[:k]) == 1).all()  # one document, in order
            first = int(row[0])
            if first in ds:
                firsts.append(first)
            else:
                assert first - t >= ds[doc[0]]  # continues the piece that started t tokens earlier
    expected = [p for p in range(n) if p not in set(ds.tolist())]
    assert sorted(real_targets(batches)) == expected
    assert sorted(firsts) == [p for p in ds.tolist() if p < n]
    masked = [make(setup, rank=r, world_size=world, mask_continued=True, **opts) for r in range(world)]
    dropped = sorted(set(expected) - set(real_targets([b for m in masked for b in all_batches(m)])))
    assert dropped == [
        p
        for p in expected
        if p - 1 not in set(ds.tolist()) and (p - 1 - ds[np.searchsorted(ds, p - 1, side="right") - 1]) % t == 0
    ]


@settings(max_examples=30)
@given(setups(), st.integers(1, 3), st.integers(0, 2))
def test_document_rows_ranks_workers_resume(setup: dict[str, Any], world: int, group: int) -> None:
    """Ranks side by side equal one process; workers interleaved and resumed streams repeat the batches."""
    opts = {"order": "documents", "pad_id": PAD, "group_lengths": group}
    bs = make(setup, **{**opts, "batch_size": setup["batch_size"] * world})
    single = all_batches(bs)
    ranks = [all_batches(make(setup, rank=r, world_size=world, **opts)) for r in range(world)]
    for k, whole in enumerate(single):
        np.testing.assert_array_equal(np.concatenate([ranks[r][k].inputs for r in range(world)]), whole.inputs)
        np.testing.assert_array_equal(np.concatenate([ranks[r][k].loss_mask for r in range(world)]), whole.loss_mask)  # type: ignore[misc]
    for step in range(len(bs) + 1):
        resumed = list(bs.resume(StreamState(epoch=0, step=step, config=bs.config)))
        assert [b.inputs.tolist() for b in resumed] == [b.inputs.tolist() for b in single[step:]]
    workers = sorted((b for i in range(3) for b in bs.iter_steps(i, 3)), key=lambda b: b.step)
    assert [b.inputs.tolist() for b in workers] == [b.inputs.tolist() for b in single]


def test_document_rows_shuffle_by_seed_and_epoch() -> None:
    """The row order depends on seed and epoch, and grouping never adds padding cells."""
    lengths = np.random.default_rng(5).integers(1, 40, 200)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    stream = TokenStream([np.arange(int(lengths.sum()), dtype=np.uint32)], starts)

    def firsts(**kw: Any) -> list[int]:
        bs = BatchStream(stream, batch_size=8, window=16, order="documents", pad_id=PAD, keep_last=True, **kw)
        return [int(x) for b in all_batches(bs) for x in b.inputs[:, 0]]

    base = firsts(seed=1)
    assert base == firsts(seed=1)
    assert base != firsts(seed=2) and base != firsts(seed=1, epoch=1)
    assert sorted(base) == sorted(firsts(seed=2))

    def pad_cells(**kw: Any) -> int:
        bs = BatchStream(stream, batch_size=8, window=16, order="documents", pad_id=PAD, keep_last=True, **kw)
        return sum(int((~b.loss_mask).sum()) for b in all_batches(bs))  # type: ignore[operator]

    assert pad_cells(seed=1, group_lengths=4) < pad_cells(seed=1)


# --- evaluation --------------------------------------------------------------------------------------


@settings(max_examples=50)
@given(setups(), st.integers(1, 3), st.integers(1, 10), st.integers(0, 3))
def test_evaluation_scores_every_target_once(setup: dict[str, Any], world: int, stride: int, seed: int) -> None:
    """Over all ranks, each target of the split is scored once; masked context is real tokens; no seed."""
    n, t = setup["n"], setup["window"]
    stride = min(stride, t)
    streams = [
        make(setup, order="evaluation", pad_id=PAD, rank=r, world_size=world, stride=stride, seed=seed)
        for r in range(world)
    ]
    assert len({len(s) for s in streams}) == 1
    scored: list[int] = []
    for s in streams:
        mine = real_targets(all_batches(s))
        assert not set(mine) & set(scored)  # ranks disjoint
        scored.extend(mine)
        for b in all_batches(s):
            assert (b.inputs[:, 0] % stride == 0).all()  # offset 0, every stride tokens
    assert sorted(scored) == list(range(1, n))
    zero = make(setup, order="evaluation", pad_id=PAD, stride=stride, seed=0)
    assert [b.inputs.tolist() for b in all_batches(zero)] == [
        b.inputs.tolist() for b in all_batches(make(setup, order="evaluation", pad_id=PAD, stride=stride))
    ]


def test_evaluation_on_a_built_split(built_dataset: Path) -> None:
    """Split.evaluation reports the targets its loss masks cover and the text size from the manifest."""
    split = open_dataset(built_dataset).split("train")
    passes = [split.evaluation(3, 16, rank=r, world_size=2, stride=8) for r in range(2)]
    masked = sum(int(b.loss_mask.sum()) for p in passes for b in p)  # type: ignore[union-attr]
    assert masked == passes[0].targets == split.num_tokens - 1
    pad = open_dataset(built_dataset).vocabulary.id_of("padding")
    single = split.evaluation(3, 16, stride=8)
    last = single.batches.batch(len(single) - 1)
    assert last.loss_mask is not None
    # past the 8 context columns, a target that is not scored is padding
    assert (last.targets[-1, 8:][~last.loss_mask[-1, 8:]] == pad).all()
    assert passes[0].text_bytes is not None and passes[0].text_bytes > split.num_tokens // 10
    assert passes[0].perplexity(0.0) == 1.0
    assert passes[0].bits_per_byte(passes[0].text_bytes * np.log(2)) == pytest.approx(1.0)


def test_row_options_are_checked() -> None:
    """Options of one order are refused on another; stride above the window and missing offsets are named."""
    stream = TokenStream([np.arange(50, dtype=np.uint16)], np.array([0, 20]))
    bare = TokenStream([np.arange(50, dtype=np.uint16)])
    with pytest.raises(StreamError, match="mask_continued: applies to order 'documents'"):
        BatchStream(stream, batch_size=2, window=4, mask_continued=True)
    with pytest.raises(StreamError, match="group_lengths"):
        BatchStream(stream, batch_size=2, window=4, order="evaluation", group_lengths=2)
    with pytest.raises(StreamError, match="stride"):
        BatchStream(stream, batch_size=2, window=4, order="evaluation", stride=5)
    with pytest.raises(StreamError, match="positions: the stream has no document offsets"):
        BatchStream(bare, batch_size=2, window=4, positions=True)
    with pytest.raises(StreamError, match="documents"):
        BatchStream(bare, batch_size=2, window=4, order="documents")
    with pytest.raises(StreamError, match="pad_id"):
        BatchStream(stream, batch_size=2, window=4, order="documents", pad_id=70000)
    grouped = BatchStream(stream, batch_size=2, window=4, order="documents", group_lengths=2)
    plain = BatchStream(stream, batch_size=2, window=4, order="documents")
    with pytest.raises(StreamError, match="different key"):
        plain.resume(grouped.state())


def test_cli_documents_and_evaluation_orders(built_dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``batches --order documents|evaluation --positions`` prints loss masks and positions in jsonl and text."""
    from seqpipe.cli import main

    base = ["batches", str(built_dataset), "--batch-size", "2", "--window", "8", "--format", "jsonl", "--positions"]
    assert main([*base, "--order", "evaluation"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    split = open_dataset(built_dataset).split("train")
    assert sum(sum(map(sum, r["loss_mask"])) for r in rows) == split.num_tokens - 1
    assert rows[0]["starts"] == [0, 8] and rows[0]["doc_position"][0][0] == 0
    assert main([*base, "--order", "documents", "--limit", "2"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert len(rows) == 2 and all(set(map(len, r["doc_index"])) == {8} for r in rows)
    starts = set(split.documents.column("start").to_pylist())
    for r in rows:
        for first, pos in zip(r["starts"], r["doc_position"], strict=True):
            assert (first in starts) == (pos[0] == 0)
    text = [*base[:-3], "--order", "documents", "--limit", "1", "--positions"]
    assert main(text) == 0
    out = capsys.readouterr().out
    assert "documents order" in out and "scored :" in out and "positions:" in out
