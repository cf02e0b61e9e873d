"""Mixtures: the row schedule's share bound, per-component window order, ranks, workers, resume,
seeds, the vocabulary check and the mixture file."""

from __future__ import annotations

import itertools
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import build_dir, run_cli, write_project
from hypothesis import given
from hypothesis import strategies as st

from seqpipe.errors import DatasetError, StreamError
from seqpipe.mixture import (
    Component,
    Mixture,
    MixtureState,
    MixtureStream,
    read_mixture,
    schedule_table,
    vocabulary_identity,
)
from seqpipe.stream import TokenStream
from seqpipe.windows import BatchStream, stream_fingerprint


def _streams(sizes: list[int]) -> list[TokenStream]:
    """One stream per size; component ``i``'s ids are ``i * 10**6 + position``, so each token says
    where it came from."""
    return [TokenStream([np.arange(n, dtype=np.int64) + i * 10**6]) for i, n in enumerate(sizes)]


@st.composite
def mixtures(draw: st.DrawFn) -> dict[str, Any]:
    """Two to four small components with weights and batch settings."""
    k = draw(st.integers(1, 4))
    window = draw(st.integers(1, 6))
    sizes = [draw(st.integers(2 * window + 1, 120)) for _ in range(k)]
    return {
        "streams": _streams(sizes),
        "weights": [draw(st.integers(1, 7)) for _ in range(k)],
        "batch_size": draw(st.integers(1, 5)),
        "window": window,
        "seed": draw(st.integers(0, 2**40)),
        "steps_per_epoch": draw(st.integers(1, 9)),
    }


def _all(ms: MixtureStream) -> list[Any]:
    return [ms.batch(s) for s in range(len(ms))]


@given(st.lists(st.integers(1, 40), min_size=1, max_size=6))
def test_every_prefix_of_the_schedule_is_within_one_row_of_the_shares(weights: list[int]) -> None:
    """After any n rows of a period, component i has floor or ceil-ish n*w_i/W rows: |count*W - n*w_i| <= W."""
    table = schedule_table(weights)
    w = np.asarray(weights) // np.gcd.reduce(np.asarray(weights))
    total = int(w.sum())
    n = np.arange(total + 1)[:, None]
    assert np.all(np.abs(table * total - n * w) <= total)
    assert np.all(table.sum(axis=1) == n[:, 0])
    assert np.all(np.diff(table, axis=0) >= 0)


@given(mixtures(), st.integers(0, 3))
def test_stream_rows_follow_the_share_bound_over_every_prefix(setup: dict[str, Any], epoch: int) -> None:
    """Counting the rows of the actual batches, every prefix of the stream is within one row of each share."""
    ms = MixtureStream(**setup, epoch=0)
    w = np.asarray(setup["weights"])
    seen = np.zeros(len(w), np.int64)
    rows = 0
    for e in range(epoch + 1):
        for step in range(len(ms)):
            for label in ms.components_for(step).tolist():
                seen[label] += 1
                rows += 1
                assert np.all(np.abs(seen * w.sum() - rows * w) <= w.sum())
        ms = ms.next_epoch()
        assert ms.epoch == e + 1


def test_weights_three_and_one_give_three_rows_and_one_in_every_batch() -> None:
    """Known answer (common practice, no source): weights 3:1 at a global batch of 4 -> 3 + 1 rows per batch."""
    ms = MixtureStream(_streams([400, 400]), [3, 1], batch_size=4, window=5, seed=9, steps_per_epoch=20)
    for epoch in range(2):
        for step in range(len(ms)):
            labels = ms.components_for(step)
            assert np.bincount(labels, minlength=2).tolist() == [3, 1]
            batch = ms.batch(step)
            assert (batch.inputs // 10**6 == labels[:, None]).all()  # each row wholly from its component
        ms = ms.next_epoch()
        assert ms.epoch == epoch + 1


@given(mixtures())
def test_each_window_comes_from_one_component_and_targets_are_shifted_inputs(setup: dict[str, Any]) -> None:
    """Every row is consecutive tokens of one component; targets are the inputs shifted by one."""
    ms = MixtureStream(**setup)
    for step in range(len(ms)):
        b = ms.batch(step)
        labels = ms.components_for(step)
        full = np.concatenate([b.inputs, b.targets[:, -1:]], axis=1)
        assert (full // 10**6 == labels[:, None]).all()
        assert (np.diff(full, axis=1) == 1).all()
        assert (full[:, 0] % 10**6 == b.starts).all()
        assert (b.targets[:, :-1] == b.inputs[:, 1:]).all()


@given(mixtures())
def test_each_component_walks_its_own_single_split_order_restarted_each_epoch(setup: dict[str, Any]) -> None:
    """The starts a component receives, in stream order, are its single-split random order (batch
    size 1, its own seed), R windows per component epoch, epoch after epoch."""
    ms = MixtureStream(**setup)
    got: list[list[int]] = [[] for _ in setup["streams"]]
    for e in range(3):
        for step in range(len(ms)):
            b = ms.batch(step)
            for label, start in zip(ms.components_for(step).tolist(), b.starts.tolist(), strict=True):
                got[label].append(start)
        ms = ms.next_epoch()
        assert ms.epoch == e + 1
    for i, starts in enumerate(got):
        r = ms.windows[i]
        expected: list[int] = []
        for epoch in range(len(starts) // r + 1):
            single = BatchStream(
                setup["streams"][i],
                batch_size=1,
                window=setup["window"],
                seed=ms.seeds[i],
                epoch=epoch,
                stream_key=ms.keys[i],
            )
            expected += [int(single.batch(s).starts[0]) for s in range(r)]
        assert starts == expected[: len(starts)]


@given(mixtures(), st.integers(1, 4), st.integers(0, 2))
def test_ranks_side_by_side_give_the_single_process_batch(setup: dict[str, Any], world: int, epoch: int) -> None:
    """Rank r of w holds rows [r*b, (r+1)*b) of the batch one process with B = w*b gets."""
    whole = MixtureStream(**{**setup, "batch_size": setup["batch_size"] * world}, epoch=epoch)
    ranks = [MixtureStream(**setup, epoch=epoch, rank=r, world_size=world) for r in range(world)]
    assert all(r.config == whole.config for r in ranks)
    for step in range(len(whole)):
        joined = np.concatenate([r.batch(step).inputs for r in ranks])
        assert np.array_equal(joined, whole.batch(step).inputs)


@given(mixtures(), st.integers(1, 4))
def test_workers_interleaved_round_robin_give_the_single_worker_stream(setup: dict[str, Any], n: int) -> None:
    """Worker i of n takes steps i, i+n, ...; interleaving them gives the one-worker stream."""
    ms = MixtureStream(**setup)
    parts = [list(MixtureStream(**setup).iter_steps(i, n)) for i in range(n)]
    merged = [b for group in itertools.zip_longest(*parts) for b in group if b is not None]
    assert stream_fingerprint(merged) == stream_fingerprint(_all(ms))


@given(mixtures(), st.integers(0, 2), st.data())
def test_resume_from_a_saved_state_equals_never_stopping(
    setup: dict[str, Any], epoch: int, data: st.DataObject
) -> None:
    """Stopping after k batches, saving the state as JSON and resuming gives the rest of the stream."""
    ms = MixtureStream(**setup, epoch=epoch)
    k = data.draw(st.integers(0, len(ms)))
    it = iter(ms)
    head = [next(it) for _ in range(k)]
    saved = json.loads(json.dumps(ms.state().to_dict()))
    fresh = MixtureStream(**setup).resume(MixtureState.from_dict(saved))
    assert stream_fingerprint(head + list(fresh)) == stream_fingerprint(_all(MixtureStream(**setup, epoch=epoch)))


@given(mixtures(), st.integers(0, 2), st.data())
def test_positions_in_the_state_match_the_rows_each_component_received(
    setup: dict[str, Any], epoch: int, data: st.DataObject
) -> None:
    """The state's per-component (epoch, window) counts the rows handed out since the stream began."""
    ms = MixtureStream(**setup, epoch=0)
    seen = np.zeros(len(setup["weights"]), np.int64)
    for _ in range(epoch):
        for step in range(len(ms)):
            seen += np.bincount(ms.components_for(step), minlength=len(seen))
        ms = ms.next_epoch()
    k = data.draw(st.integers(0, len(ms)))
    for step in range(k):
        seen += np.bincount(ms.components_for(step), minlength=len(seen))
    expected = tuple((int(c) // r, int(c) % r) for c, r in zip(seen, ms.windows, strict=True))
    assert ms.positions(k) == expected


def test_a_different_seed_gives_a_different_stream() -> None:
    """Seeds 1 and 2 give different batches (and different component seeds)."""
    streams = _streams([900, 700, 500])
    one = MixtureStream(streams, [2, 1, 1], batch_size=4, window=8, seed=1)
    two = MixtureStream(streams, [2, 1, 1], batch_size=4, window=8, seed=2)
    assert one.seeds != two.seeds and one.config != two.config
    assert stream_fingerprint(_all(one)) != stream_fingerprint(_all(two))
    again = MixtureStream(streams, [2, 1, 1], batch_size=4, window=8, seed=1)
    assert stream_fingerprint(_all(again)) == stream_fingerprint(_all(one))


def test_a_state_of_another_mixture_is_refused() -> None:
    """Resuming with a state saved under other weights fails, naming what must match."""
    streams = _streams([300, 300])
    state = MixtureStream(streams, [1, 1], batch_size=2, window=4).state()
    with pytest.raises(StreamError, match="other components, weights"):
        MixtureStream(streams, [2, 1], batch_size=2, window=4).resume(state)


def test_a_component_too_short_for_a_window_is_refused_by_name() -> None:
    """A component without one whole window at every offset is named in the error."""
    with pytest.raises(StreamError, match=r"component 1 \(b\) has 9 tokens"):
        MixtureStream(_streams([300, 9]), [1, 1], batch_size=2, window=5, keys=["a", "b"])


def test_sequential_order_is_refused() -> None:
    """Mixtures stream random order only: a row's component changes between batches."""
    with pytest.raises(StreamError, match="order"):
        MixtureStream(_streams([300]), [1], batch_size=2, window=4, order="sequential")


def test_vocabulary_identity_prefers_the_fingerprint_else_file_hash_and_tokenizer() -> None:
    """A stated vocabulary fingerprint decides; without it the file hash and tokenizer section do."""
    base = {"vocabulary": {"hash": "aa", "entries": 5}, "tokenizer": {"kind": "words", "files": []}}
    other_tok = {**base, "tokenizer": {"kind": "bytes", "files": []}}
    other_file = {**base, "vocabulary": {"hash": "bb", "entries": 5}}
    assert vocabulary_identity(base) == vocabulary_identity(json.loads(json.dumps(base)))
    assert vocabulary_identity(base) != vocabulary_identity(other_tok)
    assert vocabulary_identity(base) != vocabulary_identity(other_file)
    stated = {**base, "vocabulary": {"hash": "aa", "entries": 5, "fingerprint": "f1"}}
    assert vocabulary_identity(stated) == "f1"


@pytest.fixture(scope="module")
def two_datasets(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """Two small datasets built from different corpora (so their vocabularies differ)."""
    root = tmp_path_factory.mktemp("mix")
    first = build_dir(write_project(root / "a", seed=1), root / "one")
    second = build_dir(write_project(root / "b", seed=2, paragraphs=20), root / "two")
    return first, second


def test_datasets_with_different_vocabularies_are_refused_naming_both(two_datasets: tuple[Path, Path]) -> None:
    """Mixing two datasets whose vocabularies differ fails, and the message names both."""
    one, two = two_datasets
    mixture = Mixture([Component(str(one), "train", 1), Component(str(two), "train", 1)])
    with pytest.raises(DatasetError, match="different vocabularies") as info:
        mixture.open()
    assert str(one) in str(info.value) and str(two) in str(info.value)


def test_a_mixture_file_streams_through_the_command_line(two_datasets: tuple[Path, Path], tmp_path: Path) -> None:
    """A TOML mixture of two splits of one dataset streams the same batches as the Python API."""
    one, _ = two_datasets
    path = tmp_path / "mix.toml"
    path.write_text(
        f'[[components]]\ndataset = "{one}"\nsplit = "train"\nweight = 3\n\n'
        f'[[components]]\ndataset = "{one}"\nsplit = "validation"\nweight = 1\n',
        encoding="utf-8",
    )
    mixture = read_mixture(path)
    assert [c.weight for c in mixture.components] == [3, 1]
    ms = mixture.open().batches(batch_size=4, window=4, seed=3)
    args = ["batches", str(path), "--batch-size", "4", "--window", "4", "--seed", "3", "--limit", "5"]
    done = run_cli([*args, "--format", "hash"])
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == stream_fingerprint(ms.batch(s) for s in range(5))
    shown = run_cli(["inspect", str(path)])
    assert shown.returncode == 0, shown.stderr
    assert "weight 3" in shown.stdout and "weight 1" in shown.stdout


def test_a_mixture_file_with_an_unknown_key_is_refused(tmp_path: Path) -> None:
    """A misspelt key in the mixture file is named, not ignored."""
    path = tmp_path / "mix.toml"
    path.write_text('[[components]]\ndataset = "x"\nweigth = 2\n', encoding="utf-8")
    with pytest.raises(StreamError, match="weigth"):
        read_mixture(path)


def test_the_torch_adapter_streams_a_mixture_with_two_workers_and_resumes(
    two_datasets: tuple[Path, Path], tmp_path: Path
) -> None:
    """TorchBatches.from_mixture with two loader workers yields the numpy mixture stream; resume skips ahead."""
    torch = pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    from seqpipe.torch_data import TorchBatches

    one, _ = two_datasets
    mixture = Mixture([Component(str(one), "train", 2), Component(str(one), "validation", 1)])
    settings = {"batch_size": 3, "window": 5, "seed": 4, "steps_per_epoch": 7, "rank": 0, "world_size": 1}
    ds = TorchBatches.from_mixture(mixture, **settings)
    items = list(DataLoader(ds, batch_size=None, num_workers=2))
    expected = list(mixture.open().batches(**settings))
    assert len(items) == len(expected) == 7
    for item, batch in zip(items, expected, strict=True):
        assert torch.equal(item["inputs"], torch.from_numpy(batch.inputs))
        assert torch.equal(item["targets"], torch.from_numpy(batch.targets))
    ds.resume(ds.state_after(items[3]))
    rest = list(DataLoader(ds, batch_size=None, num_workers=0))
    assert [int(i["step"]) for i in rest] == [4, 5, 6]
    assert torch.equal(rest[0]["inputs"], torch.from_numpy(expected[4].inputs))


def test_boundary_masks_are_each_components_own() -> None:
    """With boundaries, each row's mask is its component's boundary mask at that row's start."""
    values = [np.arange(n, dtype=np.int64) + i * 10**6 for i, n in enumerate([200, 150])]
    docs = [np.arange(0, 200, 17), np.arange(0, 150, 11)]
    streams = [TokenStream([v], doc_starts=d) for v, d in zip(values, docs, strict=True)]
    ms = MixtureStream(streams, [1, 2], batch_size=3, window=6, seed=5, boundaries=True)
    for step in range(len(ms)):
        b = ms.batch(step)
        assert b.mask is not None
        for row, label in enumerate(ms.components_for(step).tolist()):
            own = streams[label].boundary_mask(b.starts[row : row + 1], 7)
            assert np.array_equal(b.mask[row], own[0])


def test_an_edited_state_is_refused() -> None:
    """A state whose component positions do not follow from its epoch and step is refused."""
    ms = MixtureStream(_streams([300, 300]), [1, 1], batch_size=2, window=4)
    data = ms.state_at(0, 3).to_dict()
    data["positions"] = [[0, 0], [0, 0]]
    with pytest.raises(StreamError, match="positions"):
        ms.resume(MixtureState.from_dict(data))


def test_epochs_per_mixture_epoch_count_the_rows_each_component_gets() -> None:
    """One mixture epoch reads, of component i, the rows the schedule gives it divided by its windows per epoch."""
    ms = MixtureStream(_streams([1000, 200]), [1, 1], batch_size=4, window=9, steps_per_epoch=30)
    rows = [0, 0]
    for step in range(len(ms)):
        for label in ms.components_for(step).tolist():
            rows[label] += 1
    assert rows == [60, 60]
    assert ms.epochs_per_mixture_epoch() == [60 / ms.windows[0], 60 / ms.windows[1]]
    assert ms.windows == [(1000 - 9) // 9, (200 - 9) // 9]


def test_the_command_line_refuses_split_with_a_mixture_file(two_datasets: tuple[Path, Path], tmp_path: Path) -> None:
    """--split with a mixture file is a usage error naming the option (the file names the splits)."""
    one, _ = two_datasets
    path = tmp_path / "mix.toml"
    path.write_text(f'[[components]]\ndataset = "{one}"\n', encoding="utf-8")
    done = run_cli(["batches", str(path), "--batch-size", "2", "--window", "4", "--split", "train", "--limit", "1"])
    assert done.returncode != 0 and "--split" in done.stderr


def test_the_command_line_refuses_positions_with_a_mixture_file(
    two_datasets: tuple[Path, Path], tmp_path: Path
) -> None:
    """--positions with a mixture file is a usage error naming the option, never silently ignored."""
    one, _ = two_datasets
    path = tmp_path / "mix.toml"
    path.write_text(f'[[components]]\ndataset = "{one}"\n', encoding="utf-8")
    done = run_cli(["batches", str(path), "--batch-size", "2", "--window", "4", "--positions", "--limit", "1"])
    assert done.returncode == 2 and "--positions" in done.stderr


# --- the paged row path ----------------------------------------------------------------------------


def _pinned_streams() -> list[TokenStream]:
    values = (np.arange(9000) * 7919 % 251).astype(np.uint16)
    return [
        TokenStream([values[:4000]]),
        TokenStream([values[4000:6500], values[6500:7000]]),
        TokenStream([values[7000:]]),
    ]


def test_pinned_fingerprints() -> None:
    """Fixed components give fixed fingerprints (two ranks, two epochs, every component through
    several of its epochs), so any change in which windows a mixture hands out is caught."""
    got = []
    for rank in range(2):
        ms = MixtureStream(
            _pinned_streams(),
            [5, 3, 2],
            keys=["demo:a", "demo:b", "demo:c"],
            batch_size=3,
            window=16,
            seed=3,
            rank=rank,
            world_size=2,
            steps_per_epoch=150,
        )
        batches = [ms.batch(s) for s in range(len(ms))] + [ms.next_epoch().batch(s) for s in range(len(ms))]
        got.append(stream_fingerprint(batches))
    # computed once with the per-batch implementation (before rows were found a page of steps at a
    # time) and pinned: the paged path must hand out the same bytes
    assert got == ["75ee69114c57b6129778a29db04221fa", "2adcc20f08a18d3ea36d03b00d06cadc"]


def _plain_starts(ms: MixtureStream, step: int) -> np.ndarray:
    """Row by row from the documented closed form: the row's component, the rows that component
    received before it, and that window of the component's single-split order (batch size 1)."""
    first = (ms.epoch * ms.steps_per_epoch + step) * ms.global_batch + ms.rank * ms.batch_size
    out = []
    for j, label in enumerate(ms.components_for(step).tolist()):
        k = int(ms.rows_before(first + j)[label])
        epoch, within = divmod(k, ms.windows[label])
        single = BatchStream(
            ms.streams[label],
            batch_size=1,
            window=ms.window,
            seed=ms.seeds[label],
            epoch=epoch,
            stream_key=ms.keys[label],
        )
        out.append(int(single.window_starts(within, 1)[0]))
    return np.asarray(out, np.int64)


@pytest.mark.parametrize("world", [1, 3])
@pytest.mark.parametrize("pattern", ["in order", "every third", "backwards", "scattered"])
def test_paged_rows_equal_the_plain_closed_form(monkeypatch: pytest.MonkeyPatch, world: int, pattern: str) -> None:
    """Whatever order steps are asked in, each batch equals the one built row by row from the
    closed form; small pages (monkeypatched) make reads cross page and component-epoch edges."""
    import seqpipe.mixture as mixture_module

    monkeypatch.setattr(mixture_module, "_ORDER_PAGE", 23)
    monkeypatch.setattr(mixture_module, "_PAGE_ROWS", 40)
    streams = _pinned_streams()
    steps = list(range(120))
    if pattern == "every third":
        steps = steps[1::3]
    elif pattern == "backwards":
        steps = steps[::-1]
    elif pattern == "scattered":
        steps = np.random.default_rng(4).permutation(120).tolist()
    for rank in range(world):
        ms = MixtureStream(
            streams,
            [5, 3, 2],
            batch_size=4,
            window=16,
            seed=8,
            epoch=1,
            rank=rank,
            world_size=world,
            steps_per_epoch=120,
        )
        for step in steps:
            b = ms.batch(step)
            starts = _plain_starts(ms, step)
            np.testing.assert_array_equal(b.starts, starts)
            labels = ms.components_for(step)
            rows = [streams[c].slice(s, s + 17) for c, s in zip(labels.tolist(), starts.tolist(), strict=True)]
            np.testing.assert_array_equal(b.inputs, np.stack(rows)[:, :-1])
            np.testing.assert_array_equal(b.targets, np.stack(rows)[:, 1:])
