"""TorchBatches: the PyTorch loader yields exactly the numpy BatchStream, across ranks and workers."""

from __future__ import annotations

import functools
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from seqpipe.errors import StreamError
from seqpipe.shards import read_shard, write_shard
from seqpipe.stream import TokenStream
from seqpipe.windows import BatchStream, StreamState


def test_package_import_does_not_import_torch() -> None:
    """Importing seqpipe and its reading side leaves torch unimported (it is optional)."""
    code = "import sys, seqpipe, seqpipe.stream, seqpipe.windows; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


torch = pytest.importorskip("torch")
from torch.utils.data import DataLoader  # noqa: E402  (only once torch is known to be present)

from seqpipe.torch_data import TorchBatches  # noqa: E402

SETTINGS: dict[str, Any] = {"batch_size": 3, "window": 7, "seed": 11, "stream_key": "demo:train"}


def values() -> np.ndarray:
    return (np.arange(1500) * 7 % 997).astype(np.uint16)


def stream() -> TokenStream:
    v = values()
    return TokenStream([v[:400], v[400:401], v[401:]], doc_starts=np.array([0, 100, 650, 1203]))


def open_from_shards(directory: str) -> TokenStream:
    """A factory run inside each worker: maps the shards itself."""
    paths = sorted(Path(directory).glob("*.arrow"))
    return TokenStream([read_shard(p) for p in paths])


def assert_items_equal(items: list[dict[str, Any]], batches: list[Any]) -> None:
    assert len(items) == len(batches)
    for item, b in zip(items, batches, strict=True):
        assert item["step"] == b.step
        assert item["epoch"] == b.epoch
        assert item["fresh"] == b.fresh
        assert item["inputs"].dtype == torch.int64
        np.testing.assert_array_equal(item["inputs"].numpy(), b.inputs)
        np.testing.assert_array_equal(item["targets"].numpy(), b.targets)
        np.testing.assert_array_equal(item["starts"].numpy(), b.starts)


@pytest.mark.parametrize("order", ["random", "sequential"])
def test_two_workers_two_ranks_match_numpy(order: str) -> None:
    """num_workers=2 on each of two simulated ranks yields the numpy stream, and ranks tile the batch."""
    per_rank = []
    for rank in (0, 1):
        ds = TorchBatches(stream(), order=order, rank=rank, world_size=2, **SETTINGS)
        items = list(DataLoader(ds, batch_size=None, num_workers=2))
        ref = list(BatchStream(stream(), order=order, rank=rank, world_size=2, **SETTINGS))
        assert len(ds) == len(ref)
        assert_items_equal(items, ref)
        per_rank.append(items)
    whole = BatchStream(stream(), order=order, **{**SETTINGS, "batch_size": 6})
    for a, b, w in zip(per_rank[0], per_rank[1], whole.iter_steps(0, 1), strict=True):
        np.testing.assert_array_equal(torch.cat([a["inputs"], b["inputs"]]).numpy(), w.inputs)


def test_spawned_workers_with_a_factory(tmp_path: Path) -> None:
    """Spawned workers rebuild the stream from a picklable factory and still match numpy."""
    v = values()
    for i, part in enumerate((v[:700], v[700:])):
        write_shard(tmp_path / f"{i:06d}.arrow", part)
    factory = functools.partial(open_from_shards, str(tmp_path))
    ds = TorchBatches(factory, rank=1, world_size=2, **SETTINGS)
    items = list(DataLoader(ds, batch_size=None, num_workers=2, multiprocessing_context="spawn"))
    assert_items_equal(items, list(BatchStream(stream(), rank=1, world_size=2, **SETTINGS)))


def test_in_process_tensors_share_memory_and_dlpack_round_trips() -> None:
    """Tensors are zero-copy views of the numpy batch; DLPack moves them both ways without copying."""
    ds = TorchBatches(stream(), **SETTINGS)
    bs = ds.batch_stream()
    batch = bs.batch(0)
    item = ds.convert(batch)
    assert item["inputs"].data_ptr() == batch.inputs.ctypes.data
    back = np.from_dlpack(item["inputs"])  # DLPack (Python array API standard, __dlpack__)
    np.testing.assert_array_equal(back, batch.inputs)
    assert np.shares_memory(back, batch.inputs)
    t = torch.from_dlpack(batch.targets)
    assert t.data_ptr() == batch.targets.ctypes.data
    np.testing.assert_array_equal(t.numpy(), batch.targets)


def test_batch_tensors_take_view_minus_one() -> None:
    """Loader tensors are contiguous, so ``tensor.view(-1)`` works as a training loss expects."""
    for order in ("random", "sequential"):
        ds = TorchBatches(stream(), order=order, **SETTINGS)
        for item in DataLoader(ds, batch_size=None, num_workers=0):
            assert item["targets"].is_contiguous() and item["inputs"].is_contiguous()
            flat = item["targets"].view(-1)  # raises on a strided tensor
            assert flat.numel() == item["targets"].numel()


def test_tuples_masks_epochs_and_resume() -> None:
    """as_tuple gives (inputs, targets); masks come through; set_epoch and resume move the start."""
    ds = TorchBatches(stream(), as_tuple=True, **SETTINGS)
    x, y = next(iter(ds))
    assert torch.equal(x[:, 1:], y[:, :-1])
    masked = TorchBatches(stream(), boundaries=True, **SETTINGS)
    first = next(iter(masked))
    assert first["mask"].dtype == torch.bool
    assert first["mask"].shape == first["inputs"].shape
    ds = TorchBatches(stream(), **SETTINGS)
    items = list(ds)
    state = ds.state_after(items[4])
    ds.resume(state)
    assert_items_equal(list(ds), list(BatchStream(stream(), start_step=5, **SETTINGS)))
    assert len(ds) == len(items) - 5
    ds.set_epoch(2)
    assert_items_equal(list(ds), list(BatchStream(stream(), epoch=2, **SETTINGS)))


def test_rank_defaults_and_bad_sources() -> None:
    """Without a process group the rank is 0 of 1; bad sources or settings raise StreamError."""
    ds = TorchBatches(stream(), **SETTINGS)
    assert (ds.rank, ds.world_size) == (0, 1)
    with pytest.raises(StreamError, match="source"):
        TorchBatches(np.arange(10), **SETTINGS)  # type: ignore[arg-type]
    with pytest.raises(StreamError, match="batch_size"):
        TorchBatches(stream(), **{**SETTINGS, "batch_size": 0})
    with pytest.raises(StreamError, match="factory returned"):
        len(TorchBatches(lambda: np.arange(10), **SETTINGS))  # type: ignore[arg-type, return-value]


def test_from_dataset_matches_split_batches(tmp_path: Path) -> None:
    """TorchBatches.from_dataset on a built dataset yields the split's own numpy batch stream."""
    from seqpipe import build
    from seqpipe.dataset import open_dataset
    from seqpipe.recipe import parse_recipe

    (tmp_path / "c.txt").write_text("\n".join(f"line {i} of the tide table" for i in range(300)) + "\n")
    recipe = parse_recipe(
        "[[sources]]\nkind = 'text'\npaths = 'c.txt'\ndocument = 'line'\n"
        "[tokenizer]\nkind = 'chars'\n[shards]\ntokens = 900\n",
        tmp_path,
    )
    out = build(recipe, tmp_path / "d", workers=1, progress=False).directory
    ds = TorchBatches.from_dataset(out, "train", batch_size=3, window=7, seed=4)
    items = list(DataLoader(ds, batch_size=None, num_workers=0))
    ref = list(open_dataset(out).split("train").batches(batch_size=3, window=7, seed=4))
    assert_items_equal(items, ref)


@pytest.mark.parametrize("context", ["fork", "spawn"])
def test_persistent_workers_follow_set_epoch_and_resume(context: str) -> None:
    """With persistent_workers=True, three epochs via set_epoch, then a resume, match the numpy streams."""
    ds = TorchBatches(stream(), **SETTINGS)
    loader = DataLoader(ds, batch_size=None, num_workers=2, persistent_workers=True, multiprocessing_context=context)
    for epoch in range(3):
        ds.set_epoch(epoch)
        assert_items_equal(list(loader), list(BatchStream(stream(), epoch=epoch, **SETTINGS)))
    ds.resume(BatchStream(stream(), epoch=1, **SETTINGS).resume(StreamState(epoch=1, step=4)).state())
    assert_items_equal(list(loader), list(BatchStream(stream(), epoch=1, start_step=4, **SETTINGS)))
