"""Weighted mixtures of dataset splits, streamed as batches of shifted windows.

A mixture names components (a dataset directory or URI, a split, a positive integer weight).
Every row of every global batch is one window of one component; which component is fixed by a
schedule over the global row index ``g = (epoch * steps_per_epoch + step) * B + j``:

* the weights, divided by their greatest common divisor, sum to a period ``P``; within each run of
  ``P`` rows component ``i`` gets exactly ``w_i`` rows. Inside a period, row ``n`` goes to the
  component whose next row is due soonest (earliest deadline first among the rows already due, ties:
  the lower index; see :func:`schedule_table`). The table of
  one period is checked at construction to keep every prefix within one row of its share, so the
  rows component ``i`` has received before row ``g`` are ``(g // P) * w_i + table[g % P, i]``:
  closed form, for any step.
* component ``i`` walks its windows in its own order: component epoch ``e`` is the first
  ``R_i = (N_i - T) // T`` windows of the single-split random order (a :class:`BatchStream` with
  batch size 1, window ``T``, the component's seed and epoch ``e``). ``R_i`` does not depend on the
  epoch's start offset (every offset leaves at least ``R_i`` whole windows), so the ``k``-th row of
  the component is window ``k % R_i`` of component epoch ``k // R_i``: a small component repeats,
  a large one is not exhausted.
* the component seed is derived from the mixture seed, the component's position and its stream key.

So a batch is a pure function of (components with their fingerprints and weights, ``B``, ``T``,
seed, steps per epoch, epoch, step): ranks take row slices, loader workers take steps round-robin,
and resuming from a :class:`MixtureState` is O(1), exactly as for one split.
"""

from __future__ import annotations

import tomllib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import xxhash

from seqpipe._hashing import hash_json
from seqpipe._parse import check_keys, parse_int, parse_str
from seqpipe.errors import DatasetError, RecipeError, StreamError
from seqpipe.stream import TokenStream
from seqpipe.windows import Batch, BatchStream, StreamState

if TYPE_CHECKING:
    from seqpipe.dataset import Dataset

MAX_PERIOD: Final = 1 << 16  # weights (after dividing by their gcd) may sum to at most this: one table row each
MIXTURE_FORMAT: Final = "seqpipe.mixture/1"
_SEED_DOMAIN: Final = "seqpipe.mixture.component-seed"
_PAGE_ROWS: Final = 4096  # most rows of one rank whose starts are found at once (as windows._PAGE_WINDOWS)
_FIRST_PAGE: Final = 8  # steps found at once when reading does not continue the last page
_ORDER_PAGE: Final = 4096  # windows of a component's order computed at once (as windows._PAGE_WINDOWS)


def _check(fn: Any, key: str, *args: Any, **kwargs: Any) -> Any:
    try:
        return fn(key, *args, **kwargs)
    except RecipeError as exc:
        raise StreamError(str(exc), key=key) from None


def vocabulary_identity(manifest: Mapping[str, Any]) -> str:
    """What must be equal for two datasets' token ids to mean the same tokens.

    The manifest's vocabulary fingerprint when it has one; otherwise the vocabulary file's hash
    together with the manifest's tokenizer section (same file, same tokenizer: same ids).
    """
    vocabulary = manifest["vocabulary"]
    stated = vocabulary.get("fingerprint")
    if isinstance(stated, str) and stated:
        return stated
    return hash_json({"vocabulary_hash": vocabulary["hash"], "tokenizer": manifest["tokenizer"]})


@dataclass(frozen=True, slots=True)
class Component:
    """One part of a mixture: ``split`` of the dataset at ``dataset`` (directory or URI), weighted."""

    dataset: str
    split: str = "train"
    weight: int = 1

    def __post_init__(self) -> None:
        _check(parse_str, "dataset", self.dataset)
        _check(parse_str, "split", self.split)
        _check(parse_int, "weight", self.weight, minimum=1)

    def to_dict(self) -> dict[str, Any]:
        return {"dataset": self.dataset, "split": self.split, "weight": self.weight}


@dataclass(frozen=True, slots=True)
class Mixture:
    """Weighted components, declared in Python or read from a TOML file with :func:`read_mixture`."""

    components: tuple[Component, ...]

    def __init__(self, components: Sequence[Component]) -> None:
        items = tuple(components)
        if not items:
            raise StreamError("mixture: expected at least one component", key="components")
        for i, c in enumerate(items):
            if not isinstance(c, Component):
                raise StreamError(f"components[{i}]: expected a Component, got {type(c).__name__}", key="components")
        object.__setattr__(self, "components", items)

    def open(self, *, verify: bool = False) -> OpenMixture:
        """Open every component's dataset (``verify`` as for ``open_dataset``); refuse components
        whose vocabularies differ."""
        from seqpipe.dataset import open_dataset

        datasets = [open_dataset(c.dataset, verify=verify) for c in self.components]
        first = vocabulary_identity(datasets[0].manifest)
        for c, ds in zip(self.components[1:], datasets[1:], strict=True):
            if vocabulary_identity(ds.manifest) != first:
                raise DatasetError(
                    f"mixture: {c.dataset} and {self.components[0].dataset} have different vocabularies "
                    "(token ids would mean different tokens); mix only datasets built with one vocabulary"
                )
        for c, ds in zip(self.components, datasets, strict=True):
            ds.split(c.split)  # an unknown split is refused here, naming the dataset
        return OpenMixture(self, tuple(datasets))


def read_mixture(path: str | Path) -> Mixture:
    """A mixture from a TOML file: ``format = "seqpipe.mixture/1"`` (optional) and one
    ``[[components]]`` table per component with ``dataset``, ``split`` (default train) and
    ``weight`` (default 1). A relative ``dataset`` path is taken from the file's directory."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise StreamError(f"{p}: not a readable mixture file ({exc})", key="mixture") from exc
    try:
        table = check_keys(str(p), data, ("format", "components"))
        fmt = table.get("format", MIXTURE_FORMAT)
        if fmt != MIXTURE_FORMAT:
            raise StreamError(f"{p}: format: expected {MIXTURE_FORMAT!r}, got {fmt!r}", key="format")
        entries = table.get("components")
        if not isinstance(entries, list) or not entries:
            raise StreamError(f"{p}: expected one or more [[components]] tables", key="components")
        components = []
        for i, entry in enumerate(entries):
            item = dict(check_keys(f"{p}: components[{i}]", entry, ("dataset", "split", "weight")))
            if "dataset" not in item:
                raise StreamError(f"{p}: components[{i}].dataset: missing", key="dataset")
            item["dataset"] = _resolve(p.parent, item["dataset"], f"{p}: components[{i}].dataset")
            components.append(Component(**item))
    except RecipeError as exc:
        raise StreamError(str(exc), key=exc.key) from None
    return Mixture(components)


def _resolve(base: Path, value: Any, key: str) -> str:
    from seqpipe.filesystem import is_uri

    text: str = _check(parse_str, key, value)
    return text if is_uri(text) or Path(text).is_absolute() else str(base / text)


@dataclass(frozen=True)
class OpenMixture:
    """A mixture with its datasets open: streams of batches over it."""

    mixture: Mixture
    datasets: tuple[Dataset, ...]

    def streams(self) -> list[TokenStream]:
        return [ds.split(c.split).stream for c, ds in zip(self.mixture.components, self.datasets, strict=True)]

    def keys(self) -> list[str]:
        return [f"{ds.fingerprint}:{c.split}" for c, ds in zip(self.mixture.components, self.datasets, strict=True)]

    def batches(self, **kwargs: Any) -> MixtureStream:
        """A :class:`MixtureStream` over the components (keyword arguments as there)."""
        weights = [c.weight for c in self.mixture.components]
        return MixtureStream(self.streams(), weights, keys=self.keys(), **kwargs)


def schedule_table(weights: Sequence[int]) -> np.ndarray:
    """Rows per component before each row of one period: shape ``(P + 1, k)``, int64.

    Row ``n`` of the period goes to the due component with the earliest deadline; the returned
    prefix counts are checked to stay within one row of ``n * w_i / P`` (exact integer test).
    """
    w = np.asarray([_check(parse_int, f"weights[{i}]", x, minimum=1) for i, x in enumerate(weights)], np.int64)
    if w.size == 0:
        raise StreamError("weights: expected at least one", key="weights")
    w //= np.gcd.reduce(w)
    period = int(w.sum())
    if period > MAX_PERIOD:
        raise StreamError(
            f"weights: their ratio needs a schedule of {period} rows (at most {MAX_PERIOD}); use smaller whole numbers",
            key="weights",
        )
    counts = np.zeros((period + 1, w.size), np.int64)
    current = np.zeros(w.size, np.int64)
    for n in range(period):  # one entry per row of the period, not per token; built once per stream
        # Component i's next row is due in rows [c*P // w, ceil((c+1)*P / w)); of those already due,
        # the earliest deadline goes first (earliest-deadline-first is optimal on one machine and these
        # rows fill the period exactly, so every row meets its window: every prefix within one row).
        released = current * period // w <= n
        deadline = np.where(released, -(-(current + 1) * period // w), np.iinfo(np.int64).max)
        current[int(np.argmin(deadline))] += 1
        counts[n + 1] = current
    spread = np.abs(counts * period - np.arange(period + 1)[:, None] * w)
    if int(spread.max()) > period:  # should never happen; guards the share bound the docs promise
        raise StreamError(f"weights: no schedule within one row for {list(weights)}", key="weights")
    return counts


def component_seed(seed: int, index: int, key: str) -> int:
    """The seed of component ``index`` (stream key ``key``) in a mixture with ``seed``."""
    text = hash_json({"domain": _SEED_DOMAIN, "seed": seed, "index": index, "key": key})
    return xxhash.xxh3_64_intdigest(text.encode("ascii")) >> 1  # a non-negative int64


@dataclass(frozen=True, slots=True)
class MixtureState:
    """Where a mixture stream stands: the next ``step`` of ``epoch``, and, for reading, where
    each component stands then (``positions[i] = (component epoch, window index in it)``)."""

    epoch: int
    step: int
    config: str = ""
    positions: tuple[tuple[int, int], ...] = ()

    def __post_init__(self) -> None:
        _check(parse_int, "epoch", self.epoch, minimum=0)
        _check(parse_int, "step", self.step, minimum=0)

    def to_dict(self) -> dict[str, Any]:
        return {"epoch": self.epoch, "step": self.step, "config": self.config, "positions": list(self.positions)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> MixtureState:
        try:
            table = check_keys("mixture_state", data, ("epoch", "step", "config", "positions"))
        except RecipeError as exc:
            raise StreamError(str(exc), key=exc.key) from None
        for key in ("epoch", "step"):
            if key not in table:
                raise StreamError(f"mixture_state.{key}: missing", key=key)
        try:
            positions = tuple((int(e), int(k)) for e, k in table.get("positions", ()))
        except (TypeError, ValueError) as exc:
            raise StreamError(
                f"mixture_state.positions: expected [epoch, index] pairs ({exc})", key="positions"
            ) from exc
        return cls(table["epoch"], table["step"], str(table.get("config", "")), positions)


class MixtureStream:
    """Batches of shifted windows over weighted token streams for one rank (see the module docstring).

    ``streams[i]`` is component ``i``'s tokens, ``weights[i]`` its positive integer weight, ``keys[i]``
    its stream key (``"<dataset fingerprint>:<split>"`` when opened from a :class:`Mixture`).
    ``batch_size``, ``window``, ``seed``, ``epoch``, ``rank``, ``world_size``, ``dtype``,
    ``boundaries`` and ``start_step`` mean what they mean for :class:`BatchStream`; only the
    random order exists (a row's component changes from batch to batch, so no row can continue
    the previous batch's row). ``steps_per_epoch`` (default: as many rows as the components hold
    windows together, divided by the global batch) only numbers the steps: the stream runs on
    across epochs without a seam. Every batch is full; ``Batch.starts`` are offsets in each row's
    own component stream, and :meth:`components_for` says which component each row came from.
    """

    def __init__(
        self,
        streams: Sequence[TokenStream],
        weights: Sequence[int],
        *,
        batch_size: int,
        window: int,
        keys: Sequence[str] | None = None,
        order: str = "random",
        seed: int = 0,
        epoch: int = 0,
        rank: int = 0,
        world_size: int = 1,
        steps_per_epoch: int | None = None,
        dtype: Any = np.int64,
        boundaries: bool = False,
        start_step: int = 0,
    ) -> None:
        self.streams = list(streams)
        if len(self.streams) != len(weights) or not self.streams:
            raise StreamError(f"weights: expected one per stream ({len(self.streams)}), got {len(weights)}")
        self.keys = [f"component{i}" for i in range(len(self.streams))] if keys is None else list(keys)
        if len(self.keys) != len(self.streams):
            raise StreamError(f"keys: expected one per stream ({len(self.streams)}), got {len(self.keys)}", key="keys")
        self.table = schedule_table(weights)
        self.weights = self.table[-1].copy()  # divided by their gcd
        self.period = int(self.weights.sum())
        self.owner = np.argmax(np.diff(self.table, axis=0), axis=1)  # component of each row of a period
        # per row of a period: its component's weight and the rows that component had before it in the period
        self._share = self.weights[self.owner]
        self._seen = self.table[np.arange(self.period), self.owner]
        self.batch_size: int = _check(parse_int, "batch_size", batch_size, minimum=1)
        self.window: int = _check(parse_int, "window", window, minimum=1)
        self.order: str = _check(parse_str, "order", order, choices=("random",))
        self.seed: int = _check(parse_int, "seed", seed, minimum=0)
        self.epoch: int = _check(parse_int, "epoch", epoch, minimum=0)
        self.world_size: int = _check(parse_int, "world_size", world_size, minimum=1)
        self.rank: int = _check(parse_int, "rank", rank, minimum=0, maximum=self.world_size - 1)
        self.boundaries = bool(boundaries)
        try:
            self.dtype: np.dtype[Any] = np.dtype(dtype)
        except TypeError as exc:
            raise StreamError(f"dtype: not a numpy dtype: {dtype!r}", key="dtype") from exc
        if not np.issubdtype(self.dtype, np.integer):
            raise StreamError(f"dtype: expected an integer type, got {self.dtype}", key="dtype")
        self.global_batch: int = self.batch_size * self.world_size
        self.windows = [self._windows_of(i, s) for i, s in enumerate(self.streams)]
        self._joined, self._bases = self._join()
        default_steps = max(1, sum(self.windows) // self.global_batch)
        self.steps_per_epoch: int = _check(
            parse_int, "steps_per_epoch", default_steps if steps_per_epoch is None else steps_per_epoch, minimum=1
        )
        self.seeds = [component_seed(self.seed, i, k) for i, k in enumerate(self.keys)]
        self.start_step: int = _check(parse_int, "start_step", start_step, minimum=0, maximum=self.steps_per_epoch)
        self._next = self.start_step
        self._walkers: dict[int, BatchStream] = {}
        self._orders: dict[int, tuple[int, int, np.ndarray]] = {}  # per component: (epoch, first window, starts)
        # (first step, step stride, joined starts, own starts) of the steps whose rows were found last,
        # and the last step asked (see _rows_of)
        self._page: tuple[int, int, np.ndarray, np.ndarray] | None = None
        self._last = -1

    def _windows_of(self, i: int, stream: TokenStream) -> int:
        if not isinstance(stream, TokenStream):
            raise StreamError(f"streams[{i}]: expected a TokenStream, got {type(stream).__name__}")
        if self.boundaries and stream.doc_starts is None:
            raise StreamError(f"boundaries: component {i} has no document offsets (doc_starts)", key="boundaries")
        if not np.can_cast(stream.dtype, self.dtype):
            raise StreamError(f"dtype: {self.dtype} cannot hold every {stream.dtype} token id", key="dtype")
        count = (len(stream) - self.window) // self.window
        if count < 1:
            raise StreamError(
                f"window: component {i} ({self.keys[i]}) has {len(stream)} tokens, too few for one window of "
                f"{self.window} at every start offset; use a shorter window or leave the component out",
                key="window",
            )
        return count

    def _join(self) -> tuple[TokenStream, np.ndarray]:
        """All components' chunks as one stream (views, no copy) and each component's first offset."""
        kinds = sorted({str(s.dtype) for s in self.streams})
        if len(kinds) > 1:
            raise StreamError(
                f"streams: components store ids as {' and '.join(kinds)}; mix only datasets built with one "
                "vocabulary (they then share one id type)",
                key="streams",
            )
        bases = np.zeros(len(self.streams), np.int64)
        np.cumsum([len(s) for s in self.streams[:-1]], out=bases[1:])
        chunks = [c for s in self.streams for c in s.chunks]
        docs = None
        if self.boundaries:  # offsets of every document, shifted to the joined stream (only when asked for)
            # _windows_of has checked that every component has doc_starts when boundaries are asked for
            docs = np.concatenate(
                [np.asarray(s.doc_starts) + b for s, b in zip(self.streams, bases.tolist(), strict=True)]
            )
        return TokenStream(chunks, doc_starts=docs, dtype=self.streams[0].dtype), bases

    # --- identity --------------------------------------------------------------------------------
    @property
    def config(self) -> str:
        """Fingerprint of everything but epoch/step/rank that fixes the batches (for MixtureState)."""
        return hash_json(
            {
                "format": MIXTURE_FORMAT,
                "keys": self.keys,
                "tokens": [len(s) for s in self.streams],
                "weights": self.weights.tolist(),
                "global_batch": self.global_batch,
                "window": self.window,
                "order": self.order,
                "seed": self.seed,
                "steps_per_epoch": self.steps_per_epoch,
            }
        )

    def __len__(self) -> int:
        return self.steps_per_epoch

    def __repr__(self) -> str:
        return (
            f"MixtureStream({len(self.streams)} components, weights {self.weights.tolist()}, B={self.global_batch} "
            f"(rank {self.rank}/{self.world_size}), window={self.window}, epoch={self.epoch}, {len(self)} batches)"
        )

    # --- the schedule ----------------------------------------------------------------------------
    def rows_before(self, row: int) -> np.ndarray:
        """Rows each component has received before global row ``row`` of the whole stream (closed form)."""
        period = self.period
        return np.asarray((row // period) * self.weights + self.table[row % period], np.int64)

    def _first_row(self, step: int) -> int:
        return (self.epoch * self.steps_per_epoch + step) * self.global_batch + self.rank * self.batch_size

    def components_for(self, step: int) -> np.ndarray:
        """The component index of each of this rank's rows at ``step``."""
        rows = self._first_row(step) + np.arange(self.batch_size, dtype=np.int64)
        return np.asarray(self.owner[rows % self.period], np.int64)

    def _component_rows(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """For global rows ``rows``: each row's component and how many rows that component received
        before it (``rows_before(row)[component]``, closed form, for many rows at once)."""
        phase = rows % self.period
        index = rows // self.period
        index *= self._share[phase]
        index += self._seen[phase]
        return self.owner[phase], index

    def positions(self, step: int) -> tuple[tuple[int, int], ...]:
        """Per component: (component epoch, window index in it) of its next row at ``step`` of this epoch."""
        before = self.rows_before((self.epoch * self.steps_per_epoch + step) * self.global_batch)
        return tuple((int(k) // r, int(k) % r) for k, r in zip(before, self.windows, strict=True))

    def _walker(self, i: int, epoch: int) -> BatchStream:
        """Component ``i``'s single-split random order at ``epoch``, kept per component (the window
        order does not depend on the batch size; :meth:`BatchStream.windows_at` reads it)."""
        walker = self._walkers.get(i)
        if walker is None or walker.epoch != epoch:
            walker = BatchStream(
                self.streams[i],
                batch_size=1,
                window=self.window,
                seed=self.seeds[i],
                epoch=epoch,
                stream_key=self.keys[i],
            )
            self._walkers[i] = walker
        return walker

    def component_starts(self, i: int, first: int, count: int) -> np.ndarray:
        """Start offsets of component ``i``'s rows ``first .. first + count - 1`` (across its epochs)."""
        return self._component_windows(i, np.arange(first, first + count, dtype=np.int64))

    def _component_windows(self, i: int, index: np.ndarray) -> np.ndarray:
        """Start offsets of component ``i``'s rows ``index`` (ascending): row ``k`` is window
        ``k % R_i`` of component epoch ``k // R_i``."""
        if not index.size:
            return np.zeros(0, np.int64)
        per_epoch = self.windows[i]
        lo, hi = int(index[0]) // per_epoch, int(index[-1]) // per_epoch
        if lo == hi:  # the usual case: one component epoch
            return self._epoch_windows(i, lo, index - lo * per_epoch)
        out = np.empty_like(index)
        cuts = np.searchsorted(index, np.arange(lo, hi + 2, dtype=np.int64) * per_epoch).tolist()
        for epoch in range(lo, hi + 1):  # one pass per component epoch met (a small component repeats)
            a, b = cuts[epoch - lo], cuts[epoch - lo + 1]
            if b > a:
                out[a:b] = self._epoch_windows(i, epoch, index[a:b] - epoch * per_epoch)
        return out

    def _epoch_windows(self, i: int, epoch: int, within: np.ndarray) -> np.ndarray:
        """Windows ``within`` (ascending) of component ``i``'s order in component ``epoch``.

        Rows read by one process lie close together: they are cut from a kept page of the order
        (``_ORDER_PAGE`` windows from the first one asked, one permutation call for several pages of
        batches). Rows spread further apart (one rank of many, a loader worker taking every n-th
        step) are computed for exactly those windows.
        """
        first, last = int(within[0]), int(within[-1])
        kept = self._orders.get(i)
        if kept is not None and kept[0] == epoch and kept[1] <= first and last < kept[1] + len(kept[2]):
            cut: np.ndarray = kept[2][within - kept[1]]
            return cut
        walker = self._walker(i, epoch)
        if last - first >= 2 * len(within):
            return walker.windows_at(within)
        end = min(max(first + _ORDER_PAGE, last + 1), self.windows[i])
        order = walker.windows_at(np.arange(first, end, dtype=np.int64))
        self._orders[i] = (epoch, first, order)
        asked: np.ndarray = order[within - first]
        return asked

    def _rows_of(self, step: int) -> tuple[np.ndarray, np.ndarray]:
        """This rank's rows at ``step``: start offsets in the joined stream and in each row's component.

        Read in order, or every n-th step as a loader worker reads, the rows of the next steps are
        found together (a page that doubles up to ``_PAGE_ROWS`` rows while the steps asked follow
        it): per page one closed-form schedule lookup and one permutation call per component, not
        per batch. Any other step starts a small page. The result depends only on the step.
        """
        page, last = self._page, self._last
        self._last = step
        most = max(1, _PAGE_ROWS // self.batch_size)
        size, stride = min(_FIRST_PAGE, most), step - last if 0 <= last < step else 1
        if page is not None:
            first, every, joined, own = page
            k, r = divmod(step - first, every)
            if r == 0 and 0 <= k < len(joined):
                return joined[k], own[k].copy()
            if step == first + len(joined) * every:
                size, stride = min(2 * len(joined), most), every
        steps = np.arange(step, min(step + size * stride, self.steps_per_epoch), stride, dtype=np.int64)
        joined, own = self._page_rows(steps)
        self._page = (step, stride, joined, own)
        return joined[0], own[0].copy()

    def _page_rows(self, steps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Joined-stream and own-component start offsets of this rank's rows at ``steps`` (ascending),
        each ``(len(steps), batch_size)``."""
        b = self.batch_size
        first = (self.epoch * self.steps_per_epoch + steps) * self.global_batch + self.rank * b
        rows = (first[:, None] + np.arange(b, dtype=np.int64)).ravel()
        label, index = self._component_rows(rows)
        own = np.empty_like(rows)
        if len(self.streams) == 1:
            own[:] = self._component_windows(0, index)
        else:
            counts = np.bincount(label, minlength=len(self.streams))
            for i in np.flatnonzero(counts).tolist():  # rows ascending: each component's in its own order
                at = np.flatnonzero(label == i)
                own[at] = self._component_windows(i, index[at])
        joined = self._bases[label]
        joined += own
        return joined.reshape(len(steps), b), own.reshape(len(steps), b)

    # --- random access ---------------------------------------------------------------------------
    def batch(self, step: int) -> Batch:
        """Batch ``step`` of this epoch for this rank, computed directly (no replay)."""
        if isinstance(step, bool) or not isinstance(step, (int, np.integer)) or not 0 <= step < len(self):
            raise StreamError(f"step: expected 0 <= step < {len(self)}, got {step!r}", key="step")
        step = int(step)
        joined, starts = self._rows_of(step)
        # One gather over all components laid end to end (no window crosses a component's end),
        # so a mixture batch costs one gather in row order, like a single split's.
        width = self.window + 1
        block = self._joined.gather(joined, width, self._joined.dtype)
        mask = self._joined.boundary_mask(joined, width) if self.boundaries else None
        return Batch(
            step=step,
            epoch=self.epoch,
            inputs=block[:, :-1].astype(self.dtype, order="C"),
            targets=block[:, 1:].astype(self.dtype, order="C"),
            starts=starts,
            fresh=True,
            mask=mask,
        )

    # --- iteration and resume --------------------------------------------------------------------
    def __iter__(self) -> Iterator[Batch]:
        """Batches from the current position to the end of the epoch; advances :meth:`state`."""
        while self._next < len(self):
            step = self._next
            out = self.batch(step)
            self._next = step + 1
            yield out

    def iter_steps(self, worker_id: int, num_workers: int) -> Iterator[Batch]:
        """Steps ``start_step + worker_id``, then every ``num_workers``-th after (one loader worker)."""
        n = _check(parse_int, "num_workers", num_workers, minimum=1)
        i = _check(parse_int, "worker_id", worker_id, minimum=0, maximum=n - 1)
        for step in range(self.start_step + i, len(self), n):
            yield self.batch(step)

    def state(self) -> MixtureState:
        """The next step this stream's iterator would produce, and where each component stands then."""
        return MixtureState(self.epoch, self._next, self.config, self.positions(self._next))

    def state_after(self, batch: Batch) -> MixtureState:
        """The state once ``batch`` has been consumed (for loaders that prefetch)."""
        return self.state_at(batch.epoch, batch.step + 1)

    def state_at(self, epoch: int, step: int) -> MixtureState:
        """The state standing before ``step`` of ``epoch``."""
        moved = self if epoch == self.epoch else self._with(epoch, 0)
        return MixtureState(epoch, step, self.config, moved.positions(step))

    def _with(self, epoch: int, start_step: int) -> MixtureStream:
        out = MixtureStream(
            self.streams,
            self.weights.tolist(),
            batch_size=self.batch_size,
            window=self.window,
            keys=self.keys,
            order=self.order,
            seed=self.seed,
            epoch=epoch,
            rank=self.rank,
            world_size=self.world_size,
            steps_per_epoch=self.steps_per_epoch,
            dtype=self.dtype,
            boundaries=self.boundaries,
            start_step=start_step,
        )
        return out

    def resume(self, state: MixtureState | StreamState) -> MixtureStream:
        """A stream like this one positioned at ``state``; refuses a state of another stream."""
        if not isinstance(state, (MixtureState, StreamState)):
            raise StreamError(f"resume: expected a MixtureState, got {type(state).__name__}")
        if state.config and state.config != self.config:
            raise StreamError(
                "resume: the state was saved by a mixture with other components, weights, global batch, "
                "window length, seed or steps per epoch; resume with the same settings",
                key="config",
            )
        if state.step > len(self):
            raise StreamError(f"resume: step {state.step} is past the end of an epoch ({len(self)} steps)", key="step")
        moved = self._with(state.epoch, state.step)
        if isinstance(state, MixtureState) and state.positions and state.positions != moved.positions(state.step):
            raise StreamError(
                "resume: the state's component positions do not follow from its epoch and step; "
                "the state was edited or saved by another version",
                key="positions",
            )
        return moved

    def next_epoch(self) -> MixtureStream:
        """The same stream at the start of the following epoch."""
        return self._with(self.epoch + 1, 0)

    def epochs_per_mixture_epoch(self) -> list[float]:
        """How many component epochs one mixture epoch (``len(self)`` global batches) reads, per component."""
        rows = self.rows_before(self.steps_per_epoch * self.global_batch)
        return [int(k) / r for k, r in zip(rows, self.windows, strict=True)]


def is_mixture_file(path: str | Path) -> bool:
    """True for a path naming a mixture file (``.toml``) rather than a dataset directory or URI."""
    return str(path).endswith(".toml")


def summary_lines(
    opened: OpenMixture, *, batch_size: int | None = None, window: int | None = None, steps: int | None = None
) -> list[str]:
    """What ``seqpipe inspect MIXTURE.toml`` prints: per component its tokens, weight, share and how
    many of its epochs one mixture epoch reads (exact for a given batch size and window, else from
    token counts alone)."""
    comps = opened.mixture.components
    tokens = [len(s) for s in opened.streams()]
    total_weight = sum(c.weight for c in comps)
    if batch_size is not None and window is not None:
        ms = opened.batches(batch_size=batch_size, window=window, steps_per_epoch=steps)
        epochs = ms.epochs_per_mixture_epoch()
        head = f"one mixture epoch: {len(ms)} steps of {ms.global_batch} windows of {window} tokens"
    else:
        # Default epoch: as many rows as all components hold windows, so about total tokens / T rows.
        epochs = [c.weight / total_weight * sum(tokens) / max(n, 1) for c, n in zip(comps, tokens, strict=True)]
        head = (
            "one mixture epoch: as many windows as the components hold together "
            "(approximate; exact with --batch-size and --window)"
        )
    lines = [
        f"mixture      {len(comps)} component(s), vocabulary {vocabulary_identity(opened.datasets[0].manifest)}",
        head,
    ]
    for c, n, e in zip(comps, tokens, epochs, strict=True):
        share = c.weight / total_weight
        lines.append(
            f"  {c.dataset} [{c.split}]: {n} tokens, weight {c.weight} ({share:.1%} of rows), {e:.3g} epochs of it"
        )
    return lines
