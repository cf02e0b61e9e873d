"""Batches of shifted windows over a token stream, reproducible across ranks, workers and resumes.

A batch row is ``window + 1`` consecutive tokens read as inputs ``[:-1]`` and targets
``[1:]``; the window length ``T = window`` is the number of tokens per row. A ``step`` is
always the index of a batch within its epoch. Every batch is a pure function of (stream key,
global batch size ``B = world_size * batch_size``, ``T``, order, seed, epoch, step), so:

* ranks: rank ``r`` of ``w`` takes rows ``[r*b, (r+1)*b)`` of the global batch;
  the ranks' batches laid side by side are the batch one process with ``B`` gets;
* workers: :meth:`BatchStream.iter_steps` hands worker ``i`` of ``n`` the steps
  ``i, i+n, ...``; interleaving workers round-robin gives the single-worker stream;
* resume: :meth:`BatchStream.batch` computes any step directly, so resuming from a
  :class:`StreamState` costs O(1): nothing is replayed and no epoch-sized table is built.

Orders (both draw a start offset in ``[0, T)`` per epoch, so window edges move):

``random``  windows start at ``offset + k*T`` for ``k < floor((N - 1 - offset) / T)``;
            they are permuted per epoch and cut into global batches of ``B``. The
            permutation is a keyed bijection of the window indices (:class:`_Shuffle`,
            a Feistel network with cycle walking, keys drawn from the seeded generator),
            evaluated a page of windows at a time: the first batch and any resumed step cost
            the same at 1M or 1G tokens, and memory does not grow with the split.
``sequential``  the usable ``N - 1 - offset`` tokens are trimmed to a multiple of ``B``
            and cut into ``B`` equal lanes; row ``j`` of step ``k`` is lane ``j``'s
            ``k``-th window, so row ``j`` of step ``k+1`` continues where step ``k`` ended
            (hidden state can be carried; ``fresh`` marks step 0).

``documents``  every row starts at a document start or continues the previous piece of the same
            document (:class:`seqpipe.rows.DocumentRows`); rows are permuted per epoch like
            windows; short rows are padded with ``pad_id`` and ``loss_mask`` marks real targets.
            ``group_lengths=K`` sorts the rows of each pool of ``K`` global batches by length
            (longest first) and cuts each global batch to its longest row.
``evaluation``  seed-free: windows from offset 0 every ``stride`` tokens (default ``window``),
            each target of the split scored exactly once (``loss_mask``), the last row padded.

With ``positions=True`` each batch also carries, per input cell, the document number within
the row and the position within that document (:func:`seqpipe.rows.row_positions`).

The generator is always ``np.random.Generator(np.random.PCG64(np.random.SeedSequence(...)))``
built from integers only; global random state is never read or written.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from math import isqrt
from typing import Any, Final

import numpy as np
import xxhash

from seqpipe._hashing import hash_json
from seqpipe._parse import check_keys, parse_bool, parse_int, parse_str
from seqpipe.errors import RecipeError, StreamError
from seqpipe.rows import (
    DocumentRows,
    EvaluationRows,
    PositionPage,
    distinct_starts,
    documents_loss_mask,
    narrow_starts,
    padded_rows,
    row_positions,
)
from seqpipe.stream import TokenStream

ORDERS: Final = ("random", "sequential", "documents", "evaluation")
_ROW_ORDERS: Final = ("documents", "evaluation")  # rows planned by seqpipe.rows, padded to the window
# Separates this use of the user's seed from any other seeded step (arbitrary constant).
_DOMAIN: Final = 0x57A3_0001
# Feistel rounds: 4 already make a pseudorandom permutation from a good round function
# (Luby-Rackoff, from memory); 6 leave a margin for our cheap multiply-xorshift mixer.
_ROUNDS: Final = 6
_MIX1: Final = np.uint64(0xBF58476D1CE4E5B9)  # multiply-xorshift finalizer constants (common practice)
_MIX2: Final = np.uint64(0x94D049BB133111EB)
_MASK64: Final = (1 << 64) - 1
_MIX1_INT: Final = int(_MIX1)  # the same constants as Python ints (the few-windows walk)
_MIX2_INT: Final = int(_MIX2)
# Windows left outside ``[0, n)`` after a vectorized pass: at most this many are walked with Python
# ints (a few microseconds each), more by another pass (some 70 us of numpy call overhead whatever the size).
_FEW_OUTSIDE: Final = 16
_POSITION_PAGE: Final = 32  # most batches whose document segments are found together (positions=True)
_PAGE_WINDOWS: Final = 4096  # permutation entries computed at once: amortizes numpy call overhead


def _check(fn: Any, key: str, *args: Any, **kwargs: Any) -> Any:
    """Run a ``seqpipe._parse`` validator, reporting failures as StreamError."""
    try:
        return fn(key, *args, **kwargs)
    except RecipeError as exc:
        raise StreamError(str(exc), key=key) from None


def _key_words(key: str) -> list[int]:
    """The stream key as four 32-bit integers (SeedSequence entropy takes integers only)."""
    digest = xxhash.xxh3_128_intdigest(key.encode("utf-8"))
    return [(digest >> (32 * i)) & 0xFFFFFFFF for i in range(4)]


class _Shuffle:
    """A keyed bijection of ``[0, n)``, computable for any index without a table.

    ``[0, a*b)`` with ``a = ceil(sqrt(n))``, ``b = ceil(n / a)`` is permuted by a Feistel network
    over the mixed radix pair ``(x // b, x % b)`` (each round ``x -> a*R + (L + F(R)) mod a`` is
    invertible, whatever ``F`` is); indices that land in ``[n, a*b)``, fewer than ``1/sqrt(n)``
    of them, are encrypted again until they fall inside ("cycle walking"), which keeps the map a
    bijection of ``[0, n)``.
    """

    __slots__ = ("a", "b", "keys", "n")

    def __init__(self, n: int, rng: np.random.Generator) -> None:
        self.n = n
        a = isqrt(n - 1) + 1 if n > 1 else 1  # ceil(sqrt(n))
        self.a, self.b = np.uint64(a), np.uint64(-(-n // a) if n else 1)
        self.keys = rng.integers(0, 2**64, size=_ROUNDS, dtype=np.uint64)

    def _walk(self, x: int) -> int:
        """``x`` encrypted until it falls in ``[0, n)`` (one window, with Python ints)."""
        while True:
            x = self._encrypt_int(x)
            if x < self.n:
                return x

    def _encrypt_int(self, x: int) -> int:
        """The rounds of :meth:`_encrypt` on one Python int, products wrapped modulo 2**64 as the
        uint64 arrays wrap them."""
        a, b = int(self.a), int(self.b)
        for key in self.keys.tolist():
            left, right = divmod(x, b)
            h = ((right ^ key) * _MIX1_INT) & _MASK64
            h ^= h >> 31
            h = (h * _MIX2_INT) & _MASK64
            h ^= h >> 29
            x = a * right + (left + h % a) % a
        return x

    def _encrypt(self, x: np.ndarray) -> np.ndarray:
        """One pass of the rounds over ``x`` (uint64 values in ``[0, a*b)``)."""
        a, b = self.a, self.b
        for key in self.keys:
            # x = a*R + (L + F(R)) mod a with (L, R) = (x // b, x % b). numpy divides a uint64 array by
            # a scalar with a multiply (fast) but takes the remainder with a hardware divide, so the two
            # remainders are products subtracted: x % b = x - (x // b) * b, and since L < a and
            # F(R) % a < a, (L + F(R) % a) % a is one conditional subtraction, written as a minimum
            # (h - a wraps to above h when h < a).
            left = x // b
            right = x - left * b
            h = right ^ key
            h *= _MIX1  # uint64 arrays wrap modulo 2**64, as the mixer intends
            h ^= h >> np.uint64(31)
            h *= _MIX2
            h ^= h >> np.uint64(29)
            h -= h // a * a
            h += left
            x = right * a
            x += np.minimum(h, h - a)
        return x

    def __call__(self, index: np.ndarray) -> np.ndarray:
        """The permuted positions of ``index`` (int64 values in ``[0, n)``)."""
        if self.n <= 1:
            return index.astype(np.int64, copy=True)
        x = self._encrypt(index.astype(np.uint64))
        outside = np.flatnonzero(x >= self.n)
        while outside.size > _FEW_OUTSIDE:
            x[outside] = self._encrypt(x[outside])
            outside = outside[x[outside] >= self.n]
        if outside.size:  # the usual case: a few windows, fewer than 1 in sqrt(n)
            x[outside] = [self._walk(v) for v in x[outside].tolist()]
        return x.astype(np.int64)


@dataclass(frozen=True, slots=True)
class StreamState:
    """Where a batch stream stands: the next ``step`` of ``epoch`` to produce.

    ``config`` is the producing stream's :attr:`BatchStream.config` (empty: not checked), so a
    state is refused by a stream whose key, sizes, order or seed differ.
    """

    epoch: int
    step: int
    config: str = ""

    def __post_init__(self) -> None:
        _check(parse_int, "epoch", self.epoch, minimum=0)
        _check(parse_int, "step", self.step, minimum=0)
        _check(parse_str, "config", self.config, allow_empty=True)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready form."""
        return {"epoch": self.epoch, "step": self.step, "config": self.config}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StreamState:
        """Inverse of :meth:`to_dict`; unknown keys are refused."""
        try:
            table = check_keys("stream_state", data, ("epoch", "step", "config"))
        except RecipeError as exc:
            raise StreamError(str(exc), key=exc.key) from None
        for key in ("epoch", "step"):
            if key not in table:
                raise StreamError(f"stream_state.{key}: missing", key=key)
        return cls(epoch=table["epoch"], step=table["step"], config=table.get("config", ""))


@dataclass(frozen=True, slots=True, eq=False)
class Batch:
    """One rank's batch: ``inputs``/``targets`` are C-contiguous ``(rows, width)`` arrays.

        ``width`` is the window length ``T``, except possibly in the last sequential batch when
        ``keep_last=True``. ``mask`` (only with ``boundaries=True``) is True where the target starts a new document.
    ``loss_mask`` (orders ``documents`` and ``evaluation``) is True on the targets that count.
    ``doc_index`` / ``doc_position`` (only with ``positions=True``) give, per input cell, the document
    number within the row (from 0; -1 on padding) and the position within that document.
    """

    step: int
    epoch: int
    inputs: np.ndarray
    targets: np.ndarray
    starts: np.ndarray
    fresh: bool
    mask: np.ndarray | None = None
    loss_mask: np.ndarray | None = None
    doc_index: np.ndarray | None = None
    doc_position: np.ndarray | None = None


class BatchStream:
    """Batches of shifted windows over ``stream`` for one rank; see the module docstring.

    ``batch_size`` is the per-rank row count ``b``; ``window`` is the window length ``T``, the
    tokens per row. ``len()`` is the number of batches (steps) in the epoch. With ``keep_last=True``
    the tail is kept: in random order the last global batch has ``m < B`` rows, split across ranks
    in rank order as evenly as possible (the first ``m % w`` ranks get ``m // w + 1`` rows, the rest
    ``m // w``; a rank may get zero rows); in sequential order the last batch has narrower windows.
    A stream too short for one batch has length 0.
    """

    def __init__(
        self,
        stream: TokenStream,
        *,
        batch_size: int,
        window: int,
        order: str = "random",
        seed: int = 0,
        epoch: int = 0,
        rank: int = 0,
        world_size: int = 1,
        keep_last: bool = False,
        dtype: Any = np.int64,
        boundaries: bool = False,
        stream_key: str = "",
        start_step: int = 0,
        positions: bool = False,
        pad_id: int = 0,
        mask_continued: bool = False,
        group_lengths: int = 0,
        stride: int | None = None,
    ) -> None:
        if not isinstance(stream, TokenStream):
            raise StreamError(f"stream: expected a TokenStream, got {type(stream).__name__}")
        self.stream = stream
        self.batch_size: int = _check(parse_int, "batch_size", batch_size, minimum=1)
        self.window: int = _check(parse_int, "window", window, minimum=1)
        self.order: str = _check(parse_str, "order", order, choices=ORDERS)
        self.seed: int = _check(parse_int, "seed", seed, minimum=0)
        self.epoch: int = _check(parse_int, "epoch", epoch, minimum=0)
        self.world_size: int = _check(parse_int, "world_size", world_size, minimum=1)
        self.rank: int = _check(parse_int, "rank", rank, minimum=0, maximum=self.world_size - 1)
        self.keep_last: bool = _check(parse_bool, "keep_last", keep_last)
        self.boundaries: bool = _check(parse_bool, "boundaries", boundaries)
        self.stream_key: str = _check(parse_str, "stream_key", stream_key, allow_empty=True)
        try:
            self.dtype: np.dtype[Any] = np.dtype(dtype)
        except TypeError as exc:
            raise StreamError(f"dtype: not a numpy dtype: {dtype!r}", key="dtype") from exc
        if not np.issubdtype(self.dtype, np.integer) or not np.can_cast(stream.dtype, self.dtype):
            raise StreamError(f"dtype: {self.dtype} cannot hold every {stream.dtype} token id", key="dtype")
        if boundaries and stream.doc_starts is None:
            raise StreamError("boundaries: the stream has no document offsets (doc_starts)", key="boundaries")
        self._init_rows(positions, pad_id, mask_continued, group_lengths, stride)
        self.global_batch = self.batch_size * self.world_size
        t, n = self.window, len(stream)
        # the permutation keys are the generator's next draws after the offset: the generator is kept
        # for them (popped once: a list pop is atomic, so two threads never draw from one generator)
        self._key_draws: list[np.random.Generator] = []
        self.offset = 0
        if self._plan is None:
            rng = self._rng()
            self.offset = int(rng.integers(0, t))
            self._key_draws.append(rng)
        usable = max(0, n - 1 - self.offset)
        if self._plan is not None:
            self.num_windows = self._plan.count
            whole, part = divmod(self.num_windows, self.global_batch)
            self.lane_length = 0
        elif self.order == "random":
            self.num_windows = usable // t
            whole, part = divmod(self.num_windows, self.global_batch)
            self.lane_length = 0
        else:
            self.num_windows = 0
            self.lane_length = usable // self.global_batch
            whole, part = divmod(self.lane_length, t)
        keep = self.keep_last or self.order == "evaluation"  # an evaluation pass scores every target
        self._len: int = whole + (1 if part and keep else 0)
        self._shuffle: _Shuffle | None = None
        self._page: tuple[int, np.ndarray] = (0, np.zeros(0, np.int64))  # (first window, starts)
        self.start_step: int = _check(parse_int, "start_step", start_step, minimum=0)
        if self.start_step > self._len:
            raise StreamError(
                f"start_step: expected at most {self._len} (the epoch has {self._len} batches), got {start_step}",
                key="start_step",
            )
        self._next = self.start_step

    def _init_rows(
        self, positions: bool, pad_id: int, mask_continued: bool, group_lengths: int, stride: int | None
    ) -> None:
        """Validate the options of positions and of the row orders; build the row plan."""
        self.positions: bool = _check(parse_bool, "positions", positions)
        self.pad_id: int = _check(parse_int, "pad_id", pad_id, minimum=0, maximum=int(np.iinfo(self.stream.dtype).max))
        self.mask_continued: bool = _check(parse_bool, "mask_continued", mask_continued)
        self.group_lengths: int = _check(parse_int, "group_lengths", group_lengths, minimum=0)
        self.stride: int | None = None
        if stride is not None:
            self.stride = _check(parse_int, "stride", stride, minimum=1, maximum=self.window)
        for key, used, needs in (
            ("mask_continued", mask_continued, "documents"),
            ("group_lengths", group_lengths, "documents"),
            ("stride", stride is not None, "evaluation"),
        ):
            if used and self.order != needs:
                raise StreamError(f"{key}: applies to order {needs!r} only, not {self.order!r}", key=key)
        if positions and self.stream.doc_starts is None:
            raise StreamError("positions: the stream has no document offsets (doc_starts)", key="positions")
        self._plan: DocumentRows | EvaluationRows | None = None
        if self.order == "documents":
            self._plan = DocumentRows(self.stream, self.window)
        elif self.order == "evaluation":
            self._plan = EvaluationRows(len(self.stream), self.window, self.stride or self.window)
        self._unique: np.ndarray | None = None  # distinct document starts, computed when first needed
        # positions=True: (first step, step stride, page) of the batches whose segments were found last,
        # and the last step asked
        self._positions_page: tuple[int, int, PositionPage] | None = None
        self._positions_last = -1
        self._narrow: np.ndarray | None = None  # the distinct starts as PositionPage.of searches them
        self._pool: tuple[int, np.ndarray, np.ndarray] = (-1, np.zeros(0, np.int64), np.zeros(0, np.int64))

    # --- identity --------------------------------------------------------------------------------
    def _rng(self) -> np.random.Generator:
        code = ORDERS.index(self.order)
        entropy = [_DOMAIN, self.seed, self.epoch, self.window, code, *_key_words(self.stream_key)]
        return np.random.Generator(np.random.PCG64(np.random.SeedSequence(entropy)))

    @property
    def config(self) -> str:
        """Fingerprint of everything but epoch/step/rank that fixes the batches (for StreamState)."""
        return hash_json(
            {
                "key": self.stream_key,
                "global_batch": self.global_batch,
                "window": self.window,
                "order": self.order,
                "seed": self.seed,
                "keep_last": self.keep_last,
                "tokens": len(self.stream),
                # only row orders add keys, so the configs of window streams stay as they were
                **(
                    {"pad_id": self.pad_id, "mask_continued": self.mask_continued, "group_lengths": self.group_lengths}
                    if self.order == "documents"
                    else {"stride": self.stride or self.window}
                    if self.order == "evaluation"
                    else {}
                ),
            }
        )

    def __len__(self) -> int:
        return self._len

    def __repr__(self) -> str:
        return (
            f"BatchStream({self.order}, B={self.global_batch} (rank {self.rank}/{self.world_size}), "
            f"window={self.window}, epoch={self.epoch}, {self._len} batches)"
        )

    # --- random access ---------------------------------------------------------------------------
    def window_starts(self, first: int, count: int) -> np.ndarray:
        """Start offsets of permuted windows ``first .. first + count - 1`` of the epoch (public:
        a mixture walks each component's windows in this order).

        Entries are computed a page at a time and the last page is kept. A page starts at eight
        global batches (so a first or resumed batch is cheap) and doubles while reading moves
        forward, up to ``_PAGE_WINDOWS``, so steady reading pays little numpy overhead per batch.
        In the row orders the entries are the permuted row numbers themselves.
        """
        lo, cached = self._page
        if lo <= first and first + count <= lo + len(cached):
            return cached[first - lo : first - lo + count].copy()
        shuffle = self._shuffler()
        big = self.global_batch
        start = first // big * big
        forward = bool(cached.size) and start >= lo
        most = max(_PAGE_WINDOWS // big, 1) * big
        size = min(2 * len(cached), most) if forward else min(8 * big, most)
        end = min(max(start + size, first + count), self.num_windows)
        idx = np.arange(start, end, dtype=np.int64)
        perm = shuffle(idx)
        self._page = (start, perm if self._plan is not None else perm * self.window + self.offset)
        return self._page[1][first - start : first - start + count].copy()

    def windows_at(self, index: np.ndarray) -> np.ndarray:
        """Start offsets of the permuted windows at epoch positions ``index`` (int64, each in
        ``[0, num_windows)``), in the order given: entry ``k`` is ``window_starts(index[k], 1)[0]``.

        Computed for exactly these positions and not kept (the permutation is evaluated per
        entry), so a caller that needs scattered positions, such as a mixture's component rows
        within a page of its batches, pays for no others. In the row orders the entries are the
        permuted row numbers themselves.
        """
        idx = np.asarray(index, dtype=np.int64)
        if idx.size and (int(idx.min()) < 0 or int(idx.max()) >= self.num_windows):
            raise StreamError(f"index: expected window positions in [0, {self.num_windows})", key="index")
        perm = self._shuffler()(idx)
        if self._plan is None:
            perm *= self.window
            perm += self.offset
        return perm

    def _shuffler(self) -> _Shuffle:
        """The epoch's permutation of the windows (or planned rows), built on first use."""
        if self._shuffle is None:
            try:
                rng = self._key_draws.pop()
            except IndexError:  # another thread took it: the same draws again
                rng = self._rng()
                if self._plan is None:
                    rng.integers(0, self.window)  # the offset draw, replayed so the keys follow it
            self._shuffle = _Shuffle(self.num_windows, rng)
        return self._shuffle

    def rows(self, step: int) -> tuple[int, int]:
        """This rank's row range ``[lo, hi)`` within global batch ``step``."""
        b, w, r = self.batch_size, self.world_size, self.rank
        if self.order != "sequential":
            m = min(self.global_batch, self.num_windows - step * self.global_batch)
        else:
            m = self.global_batch
        if m == self.global_batch:
            return r * b, (r + 1) * b
        q, rem = divmod(m, w)
        lo = r * q + min(r, rem)
        return lo, lo + q + (1 if r < rem else 0)

    def _step(self, step: int) -> int:
        if isinstance(step, bool) or not isinstance(step, (int, np.integer)) or not 0 <= step < self._len:
            raise StreamError(f"step: expected 0 <= step < {self._len}, got {step!r}", key="step")
        return int(step)

    def starts_for(self, step: int) -> tuple[np.ndarray, int]:
        """Window start offsets of this rank's rows at ``step`` and the window width."""
        step = self._step(step)
        if self._plan is not None:
            ids, width = self._row_ids(step)
            return self._plan.locate(ids).starts, width
        lo, hi = self.rows(step)
        if self.order == "random":
            return self.window_starts(step * self.global_batch + lo, hi - lo), self.window
        lanes = np.arange(lo, hi, dtype=np.int64)
        width = min(self.window, self.lane_length - step * self.window)
        return self.offset + lanes * self.lane_length + step * self.window, width

    def _shuffled(self, first: int, count: int) -> np.ndarray:
        """Rows ``first .. first + count - 1`` of the epoch's permutation of the planned rows."""
        return self.window_starts(first, count)

    def _row_ids(self, step: int) -> tuple[np.ndarray, int]:
        """Planned rows of this rank at ``step`` and the batch width (row orders)."""
        assert self._plan is not None
        lo, hi = self.rows(step)
        big = self.global_batch
        first = step * big
        if self.order == "evaluation":
            return np.arange(first + lo, first + hi, dtype=np.int64), self.window
        if not self.group_lengths:
            return self._shuffled(first + lo, hi - lo), self.window
        pool = step // self.group_lengths
        pool_first = pool * self.group_lengths * big
        if self._pool[0] != pool:
            ids = self._shuffled(pool_first, min(self.num_windows, pool_first + self.group_lengths * big) - pool_first)
            real = self._plan.locate(ids).real
            by_length = np.argsort(-real, kind="stable")  # stable: ties keep the shuffled order
            self._pool = (pool, ids[by_length], real[by_length])
        _, ids, real = self._pool
        at = first - pool_first
        # the width comes from the whole global batch, so every rank gets the same width
        width = min(self.window, max(1, int(real[at : at + big].max()) - 1))
        return ids[at + lo : at + hi].copy(), width

    def _starts_unique(self) -> np.ndarray:
        if self._unique is None:
            self._unique = distinct_starts(self.stream.doc_starts)
        return self._unique

    def _positions(self, step: int, starts: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray]:
        """Document numbers and positions of the rows of window batch ``step`` (``starts``).

        Read in order, or every n-th step as a loader worker reads, the segments of the next
        batches are found together (a page that doubles up to ``_POSITION_PAGE`` batches while the
        steps asked follow it); any other step is computed alone. The result depends only on the
        step, never on what was asked before.
        """
        cached, last = self._positions_page, self._positions_last
        self._positions_last = step
        size, stride = 1, step - last if 0 <= last < step else 1
        if cached is not None:
            first, every, page = cached
            k, r = divmod(step - first, every)
            if r == 0 and 0 <= k < page.batches and page.width == width and page.rows == len(starts):
                return page.take(k)
            if step == first + page.batches * every:
                size, stride = min(2 * page.batches, _POSITION_PAGE), every
        if self._narrow is None:
            self._narrow = narrow_starts(self._starts_unique())
        page = PositionPage.of(self._narrow, self._starts_ahead(step, size, stride, starts, width), len(starts), width)
        self._positions_page = (step, stride, page)
        return page.take(0)

    def _starts_ahead(self, step: int, size: int, stride: int, starts: np.ndarray, width: int) -> np.ndarray:
        """``starts`` (the rows of ``step``) followed by the rows of up to ``size - 1`` later steps
        ``stride`` apart that have as many rows of the same width."""
        last = min(step + size * stride, self._len)
        steps = range(step + stride, last, stride)
        rows = len(starts)
        if not steps:
            return starts
        lo, hi = self.rows(step)
        big = self.global_batch
        if self.order == "random" and stride == 1 and hi - lo == self.batch_size and last * big <= self.num_windows:
            # whole global batches: one slice of the permutation, not one call per step
            ahead = self.window_starts((step + 1) * big, len(steps) * big).reshape(len(steps), big)
            return np.concatenate((starts, ahead[:, lo:hi].ravel()))
        blocks = [starts]
        for later in steps:
            more, more_width = self.starts_for(later)
            if more_width != width or len(more) != rows:
                break
            blocks.append(more)
        return np.concatenate(blocks)

    def _row_batch(self, step: int) -> Batch:
        """Batch ``step`` of a row order: padded rows with their loss mask."""
        assert self._plan is not None
        ids, width = self._row_ids(step)
        rows = self._plan.locate(ids)
        block, padding = padded_rows(self.stream, rows.starts, rows.real, width + 1, self.pad_id)
        if isinstance(self._plan, EvaluationRows):
            loss = self._plan.loss_mask(ids, rows.real, width)
        else:
            loss = documents_loss_mask(rows, padding, self.mask_continued)
        cols = np.arange(width, dtype=np.int64)
        doc_index = doc_position = mask = None
        if self.positions:
            real_inputs = ~padding[:, :-1]
            doc_index, doc_position = row_positions(self._starts_unique(), rows.starts[:, None] + cols, real_inputs)
        if self.boundaries:
            real_targets = ~padding[:, 1:]
            _, at = row_positions(self._starts_unique(), rows.starts[:, None] + 1 + cols, real_targets)
            mask = (at == 0) & real_targets
        return Batch(
            step=int(step),
            epoch=self.epoch,
            inputs=block[:, :-1].astype(self.dtype, order="C"),
            targets=block[:, 1:].astype(self.dtype, order="C"),
            starts=rows.starts,
            fresh=True,
            mask=mask,
            loss_mask=loss,
            doc_index=doc_index,
            doc_position=doc_position,
        )

    def batch(self, step: int) -> Batch:
        """Batch ``step`` of this epoch for this rank, computed directly (no replay)."""
        if self._plan is not None:
            return self._row_batch(self._step(step))
        starts, width = self.starts_for(step)
        block = self.stream.gather(starts, width + 1, self.stream.dtype)  # stored width: the cheapest copy
        mask = self.stream.boundary_mask(starts, width + 1) if self.boundaries else None
        doc_index = doc_position = None
        if self.positions:
            doc_index, doc_position = self._positions(step, starts, width)
        fresh = self.order == "random" or step == 0
        # Two C-contiguous arrays, not views of one block: frameworks reshape them in place (a strided
        # view refuses ``tensor.view(-1)``). The cast to the output dtype makes each copy in one pass.
        return Batch(
            step=int(step),
            epoch=self.epoch,
            inputs=block[:, :-1].astype(self.dtype, order="C"),
            targets=block[:, 1:].astype(self.dtype, order="C"),
            starts=starts,
            fresh=fresh,
            mask=mask,
            doc_index=doc_index,
            doc_position=doc_position,
        )

    # --- iteration -------------------------------------------------------------------------------
    def __iter__(self) -> Iterator[Batch]:
        """Batches from the current position to the end of the epoch; advances :meth:`state`."""
        while self._next < self._len:
            step = self._next
            out = self.batch(step)
            self._next = step + 1  # the batch counts as consumed once handed out
            yield out

    def iter_steps(self, worker_id: int, num_workers: int) -> Iterator[Batch]:
        """Steps ``start_step + worker_id``, then every ``num_workers``-th after (one loader worker).

        Does not move :meth:`state`; the consumer knows how many batches it has taken.
        """
        n = _check(parse_int, "num_workers", num_workers, minimum=1)
        i = _check(parse_int, "worker_id", worker_id, minimum=0, maximum=n - 1)
        for step in range(self.start_step + i, self._len, n):
            yield self.batch(step)

    # --- resume ----------------------------------------------------------------------------------
    def state(self) -> StreamState:
        """The next step this stream's iterator would produce."""
        return StreamState(epoch=self.epoch, step=self._next, config=self.config)

    def state_after(self, batch: Batch) -> StreamState:
        """The state once ``batch`` has been consumed (for loaders that prefetch)."""
        return StreamState(epoch=batch.epoch, step=batch.step + 1, config=self.config)

    def _with(self, epoch: int, start_step: int) -> BatchStream:
        return BatchStream(
            self.stream,
            batch_size=self.batch_size,
            window=self.window,
            order=self.order,
            seed=self.seed,
            epoch=epoch,
            rank=self.rank,
            world_size=self.world_size,
            keep_last=self.keep_last,
            dtype=self.dtype,
            boundaries=self.boundaries,
            stream_key=self.stream_key,
            start_step=start_step,
            positions=self.positions,
            pad_id=self.pad_id,
            mask_continued=self.mask_continued,
            group_lengths=self.group_lengths,
            stride=self.stride,
        )

    def resume(self, state: StreamState) -> BatchStream:
        """A stream like this one positioned at ``state`` (any epoch); refuses a foreign state."""
        if not isinstance(state, StreamState):
            raise StreamError(f"resume: expected a StreamState, got {type(state).__name__}")
        if state.config and state.config != self.config:
            raise StreamError(
                "resume: the state was saved by a stream with a different key, global batch, "
                "window length, order, seed or token count; resume with the same settings",
                key="config",
            )
        probe = self if state.epoch == self.epoch else self._with(state.epoch, 0)
        if state.step > len(probe):
            raise StreamError(
                f"resume: step {state.step} is past the end of epoch {state.epoch} ({len(probe)} batches)", key="step"
            )
        return probe._with(state.epoch, state.step)

    def next_epoch(self) -> BatchStream:
        """The same stream at the start of the following epoch."""
        return self._with(self.epoch + 1, 0)


def stream_fingerprint(batches: Iterable[Batch]) -> str:
    """XXH3-128 (hex) over each batch's inputs then targets as little-endian int64, in order."""
    h = xxhash.xxh3_128()
    for b in batches:
        for arr in (b.inputs, b.targets):
            h.update(np.ascontiguousarray(arr, dtype="<i8").data)
    return h.hexdigest()
