"""Optional PyTorch adapter: a :class:`BatchStream` as an ``IterableDataset``.

Importing this module imports torch; nothing else in seqpipe does. Use it with
automatic batching off, since every item already is a batch::

    ds = TorchBatches(stream, batch_size=8, window=256, seed=1, stream_key=key)
    loader = DataLoader(ds, batch_size=None, num_workers=2)

Rank and world size come from the arguments or, when omitted, from an
initialized ``torch.distributed`` process group (else 0 and 1), read once in
the process that builds the dataset. Loader workers split the batches round-robin
by step (:meth:`BatchStream.iter_steps`), and the loader's in-order round-robin
fetch puts them back in step order, so a loader yields exactly the numpy stream.
:meth:`TorchBatches.set_epoch` and :meth:`TorchBatches.resume` also reach workers kept alive
with ``persistent_workers=True``: the position lives in shared memory that each worker reads
when a pass starts.

Arrays become tensors with ``torch.from_numpy`` (no copy in the producing
process). With the ``spawn``/``forkserver`` start methods the dataset is pickled
into each worker; pass a picklable zero-argument *factory* returning the
TokenStream (e.g. ``functools.partial`` of a function that opens the dataset) so
workers map the shards themselves instead of receiving copies of them.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.distributed as dist
from torch.utils.data import IterableDataset, get_worker_info

from seqpipe.errors import StreamError
from seqpipe.mixture import Mixture, MixtureState, MixtureStream, OpenMixture
from seqpipe.stream import TokenStream
from seqpipe.windows import Batch, BatchStream, StreamState

StreamSource = TokenStream | Callable[[], TokenStream | OpenMixture]


def _open_mixture(mixture: Mixture) -> OpenMixture:
    return mixture.open()


def _split_stream(directory: str, split: str) -> TokenStream:
    from seqpipe.dataset import open_dataset

    return open_dataset(directory).split(split).stream


def default_rank_world() -> tuple[int, int]:
    """(rank, world size) of the initialized default process group, else (0, 1)."""
    if dist.is_available() and dist.is_initialized():
        return dist.get_rank(), dist.get_world_size()
    return 0, 1


class TorchBatches(IterableDataset[Any]):
    """Batches of one rank as CPU tensors; the keyword arguments are those of :class:`BatchStream`.

    Items are dicts ``{"inputs", "targets", "starts", "step", "epoch", "fresh"}`` (plus ``"mask"``
    with ``boundaries=True``), or ``(inputs, targets)`` tuples with ``as_tuple=True``.
    ``len()`` is the number of batches left in the epoch from ``start_step``.
    """

    @classmethod
    def from_dataset(cls, directory: str | Path, split: str = "train", **kwargs: Any) -> TorchBatches:
        """Batches of one split of a built dataset; workers map the shards themselves.

        The keyword arguments are those of :class:`BatchStream` (``stream_key`` is set to the
        dataset fingerprint and split, as ``Split.batches`` does).
        """
        from seqpipe.dataset import open_dataset

        ds = open_dataset(directory)
        ds.split(split)  # refuse an unknown split here, not in a worker
        factory = functools.partial(_split_stream, str(directory), split)
        return cls(factory, stream_key=f"{ds.fingerprint}:{split}", **kwargs)

    @classmethod
    def from_mixture(cls, mixture: str | Path | Mixture, **kwargs: Any) -> TorchBatches:
        """Batches of a mixture (a :class:`Mixture` or a mixture file); workers open the datasets
        themselves. Keyword arguments are those of :class:`MixtureStream` (``rank``/``world_size``
        default as for every TorchBatches)."""
        from seqpipe.mixture import read_mixture

        mix = mixture if isinstance(mixture, Mixture) else read_mixture(mixture)
        mix.open()  # refuse different vocabularies or unknown splits here, not in a worker
        steps = kwargs.pop("steps_per_epoch", None)
        if kwargs.get("keep_last"):
            raise StreamError(
                "keep_last: a mixture has no last, smaller batch (its epochs have no tail)", key="keep_last"
            )
        out = cls(functools.partial(_open_mixture, mix), **kwargs)
        out._mixture_steps = steps
        out.batch_stream()  # validate the settings now rather than inside a worker
        return out

    def __init__(
        self,
        source: StreamSource,
        *,
        batch_size: int,
        window: int,
        order: str = "random",
        seed: int = 0,
        epoch: int = 0,
        rank: int | None = None,
        world_size: int | None = None,
        keep_last: bool = False,
        dtype: Any = np.int64,
        boundaries: bool = False,
        stream_key: str = "",
        start_step: int = 0,
        as_tuple: bool = False,
    ) -> None:
        super().__init__()
        if not isinstance(source, TokenStream) and not callable(source):
            raise StreamError(f"source: expected a TokenStream or a factory returning one, got {type(source).__name__}")
        auto_rank, auto_world = default_rank_world() if rank is None or world_size is None else (0, 1)
        self._source = source
        self._settings: dict[str, Any] = {
            "batch_size": batch_size,
            "window": window,
            "order": order,
            "seed": seed,
            "epoch": epoch,
            "rank": auto_rank if rank is None else rank,
            "world_size": auto_world if world_size is None else world_size,
            "keep_last": keep_last,
            "dtype": dtype,
            "boundaries": boundaries,
            "stream_key": stream_key,
            "start_step": start_step,
        }
        self.as_tuple = bool(as_tuple)
        self._cache: BatchStream | MixtureStream | None = None
        self._made: TokenStream | OpenMixture | None = None  # what the source gave, once per process
        self._mixture_steps: int | None = None
        # (epoch, start step) in shared memory: loader workers keep their own copy of this object
        # (persistent_workers=True keeps it across passes), so set_epoch/resume in the main process
        # reach them only through memory both sides see; each __iter__ reads it before the first batch.
        position = torch.tensor([int(epoch), int(start_step)], dtype=torch.int64)
        self._position = position.share_memory_()  # type: ignore[no-untyped-call]  # torch leaves it unannotated
        if isinstance(source, TokenStream):
            self.batch_stream()  # validate the settings now rather than inside a worker

    # --- the underlying numpy stream -----------------------------------------------------------------
    def batch_stream(self) -> BatchStream | MixtureStream:
        """The BatchStream (or MixtureStream) this dataset reads (built on first use in each process)."""
        if self._cache is None:
            self._cache = self._stream_at(self._settings)
        return self._cache

    def _stream_at(self, settings: dict[str, Any]) -> BatchStream | MixtureStream:
        if self._made is None:
            made = self._source if isinstance(self._source, TokenStream) else self._source()
            if not isinstance(made, (TokenStream, OpenMixture)):
                raise StreamError(f"source: the factory returned {type(made).__name__}, not a TokenStream")
            self._made = made
        if isinstance(self._made, OpenMixture):
            kept = {k: v for k, v in settings.items() if k not in ("keep_last", "stream_key")}
            return self._made.batches(steps_per_epoch=self._mixture_steps, **kept)
        return BatchStream(self._made, **settings)

    @property
    def rank(self) -> int:
        return int(self._settings["rank"])

    @property
    def world_size(self) -> int:
        return int(self._settings["world_size"])

    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        if not isinstance(self._source, TokenStream):
            state["_cache"] = state["_made"] = None  # workers rebuild from the factory instead of receiving arrays
        return state

    def __len__(self) -> int:
        bs = self.batch_stream()
        return len(bs) - bs.start_step

    # --- position ------------------------------------------------------------------------------------
    def set_epoch(self, epoch: int) -> None:
        """Start the next iteration at step 0 of ``epoch`` (call before each loader pass)."""
        self._move(epoch, 0)

    def resume(self, state: StreamState | MixtureState) -> None:
        """Start the next iteration at ``state`` (validated like :meth:`BatchStream.resume`)."""
        bs = self.batch_stream()
        if isinstance(bs, MixtureStream):
            moved: BatchStream | MixtureStream = bs.resume(state)
        elif isinstance(state, MixtureState):
            raise StreamError("resume: the state was saved by a mixture stream, not by one split; resume a mixture")
        else:
            moved = bs.resume(state)
        self._move(moved.epoch, moved.start_step)

    def _move(self, epoch: int, start_step: int) -> None:
        self._adopt(epoch, start_step)
        self._position[0], self._position[1] = epoch, start_step

    def _adopt(self, epoch: int, start_step: int) -> None:
        """Rebuild this copy's BatchStream at (epoch, start_step) unless it already stands there."""
        if (self._settings["epoch"], self._settings["start_step"]) == (epoch, start_step):
            return
        settings = {**self._settings, "epoch": epoch, "start_step": start_step}
        self._cache = self._stream_at(settings)  # validates before anything changes
        self._settings = settings

    def state_after(self, item: dict[str, Any] | Batch) -> StreamState | MixtureState:
        """The state once the loader item (dict form) or numpy batch has been consumed."""
        bs = self.batch_stream()
        if isinstance(item, Batch):
            return bs.state_after(item)
        if isinstance(bs, MixtureStream):
            return bs.state_at(int(item["epoch"]), int(item["step"]) + 1)
        return StreamState(epoch=int(item["epoch"]), step=int(item["step"]) + 1, config=bs.config)

    # --- iteration -----------------------------------------------------------------------------------
    def __iter__(self) -> Iterator[Any]:
        info = get_worker_info()
        worker, workers = (0, 1) if info is None else (info.id, info.num_workers)
        epoch, start_step = (int(v) for v in self._position.tolist())
        self._adopt(epoch, start_step)  # a persistent worker's copy follows the main process
        for batch in self.batch_stream().iter_steps(worker, workers):
            yield self.convert(batch)

    def convert(self, batch: Batch) -> Any:
        """A numpy Batch as tensors sharing its memory (``torch.from_numpy``)."""
        inputs, targets = torch.from_numpy(batch.inputs), torch.from_numpy(batch.targets)
        if self.as_tuple:
            return inputs, targets
        out: dict[str, Any] = {
            "inputs": inputs,
            "targets": targets,
            "starts": torch.from_numpy(batch.starts),
            "step": batch.step,
            "epoch": batch.epoch,
            "fresh": batch.fresh,
        }
        for name in ("mask", "loss_mask", "doc_index", "doc_position"):
            value = getattr(batch, name)
            if value is not None:
                out[name] = torch.from_numpy(value)
        return out
