"""One logical token stream over many chunks (usually memory-mapped shards).

A split's stream is its shards concatenated, but concatenating would copy the
whole split into memory. :class:`TokenStream` keeps the chunks as they are and
translates stream offsets into (chunk, local offset) with ``np.searchsorted``
over the cumulative chunk starts, so building one costs O(number of chunks)
and reading a window touches only the pages it needs.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from seqpipe.errors import StreamError


def _as_offsets(values: Any, name: str) -> np.ndarray:
    if type(values) is np.ndarray and values.dtype == np.int64 and values.ndim == 1:
        return values  # the hot path: BatchStream always passes int64 starts
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise StreamError(f"{name}: expected a 1-D array, got shape {arr.shape}")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        raise StreamError(f"{name}: expected integers, got dtype {arr.dtype}")
    return arr.astype(np.int64, copy=False)


class TokenStream:
    """A read-only 1-D token stream made of ``chunks`` laid end to end.

    ``chunks`` are 1-D integer arrays of one dtype (empty chunks are allowed and
    never read). ``doc_starts`` optionally lists the sorted stream offsets where
    documents begin; it is needed only for :meth:`boundary_mask`. ``dtype``
    names the token type of a stream with no chunks at all.
    """

    __slots__ = ("_chunks", "_doc_starts", "_dtype", "_offsets", "_views")

    def __init__(
        self,
        chunks: Sequence[np.ndarray],
        doc_starts: np.ndarray | None = None,
        *,
        dtype: np.dtype[Any] | type | None = None,
    ) -> None:
        arrays = list(chunks)
        for i, chunk in enumerate(arrays):
            if not isinstance(chunk, np.ndarray) or chunk.ndim != 1:
                raise StreamError(
                    f"chunks[{i}]: expected a 1-D numpy array, got {type(chunk).__name__}"
                    + (f" of shape {chunk.shape}" if isinstance(chunk, np.ndarray) else "")
                )
            if not np.issubdtype(chunk.dtype, np.integer):
                raise StreamError(f"chunks[{i}]: expected integer token ids, got dtype {chunk.dtype}")
        if arrays:
            first = arrays[0].dtype
            for i, chunk in enumerate(arrays):
                if chunk.dtype != first:
                    raise StreamError(
                        f"chunks[{i}]: dtype {chunk.dtype} differs from chunks[0] ({first}); "
                        "every shard of a split must use one id type"
                    )
            self._dtype: np.dtype[Any] = first
        else:
            self._dtype = np.dtype(np.int64 if dtype is None else dtype)
        self._chunks = tuple(arrays)
        offsets = np.zeros(len(arrays) + 1, dtype=np.int64)
        np.cumsum([len(c) for c in arrays], out=offsets[1:])
        self._offsets = offsets
        if doc_starts is None:
            self._doc_starts: np.ndarray | None = None
        else:
            starts = _as_offsets(doc_starts, "doc_starts")
            if starts.size:
                if starts[0] < 0 or starts[-1] > len(self):
                    raise StreamError(
                        f"doc_starts: offsets must lie in [0, {len(self)}], got "
                        f"{int(starts.min())}..{int(starts.max())}"
                    )
                if np.any(starts[1:] < starts[:-1]):
                    raise StreamError("doc_starts: offsets must be sorted ascending")
            self._doc_starts = starts
        # per window length, per chunk: its sliding-window view, built when first read
        self._views: dict[int, list[np.ndarray | None]] = {}

    def __getstate__(self) -> dict[str, Any]:
        # the window views are rebuilt on demand; pickling them would copy every chunk length-fold
        return {"chunks": self._chunks, "doc_starts": self._doc_starts, "dtype": self._dtype}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__init__(state["chunks"], state["doc_starts"], dtype=state["dtype"])  # type: ignore[misc]

    # --- shape -----------------------------------------------------------------------------------
    def __len__(self) -> int:
        return int(self._offsets[-1])

    def __repr__(self) -> str:
        return f"TokenStream({len(self)} tokens, {len(self._chunks)} chunks, dtype={self._dtype})"

    @property
    def dtype(self) -> np.dtype[Any]:
        """The token id type of every chunk."""
        return self._dtype

    @property
    def chunks(self) -> tuple[np.ndarray, ...]:
        """The chunks, in stream order (not copies)."""
        return self._chunks

    @property
    def chunk_offsets(self) -> np.ndarray:
        """Stream offset of each chunk's first token, then the stream length (int64, n_chunks + 1)."""
        return self._offsets

    @property
    def doc_starts(self) -> np.ndarray | None:
        """Sorted stream offsets where documents begin, or None when unknown."""
        return self._doc_starts

    # --- reading ---------------------------------------------------------------------------------
    # Chunk lookup: side="right" minus one picks the last chunk starting at or before a position;
    # for any position < len(self) that chunk is non-empty even when empty chunks share its offset.

    def _check_range(self, starts: np.ndarray, length: int) -> None:
        if starts.size == 0:
            return
        lo, hi = int(starts.min()), int(starts.max())
        if lo < 0 or hi + length > len(self):
            self._range_error(lo if lo < 0 else hi, length)

    def _range_error(self, start: int, length: int) -> None:
        raise StreamError(f"window [{start}, {start + length}) is outside the stream of {len(self)} tokens")

    def _window_view(self, c: int, length: int) -> np.ndarray:
        """Chunk ``c`` as a read-only ``(len - length + 1, length)`` sliding-window view, cached."""
        views = self._views.get(length)
        if views is None:
            if len(self._views) >= 4:  # a stream is read at one or two widths; keep the cache tiny
                self._views.pop(next(iter(self._views)))
            views = self._views[length] = [None] * len(self._chunks)
        view = views[c]
        if view is None:
            chunk = self._chunks[c]
            if chunk.flags.c_contiguous:
                # the ndarray constructor instead of sliding_window_view, whose checks cost far
                # more when the first batch of a split touches every shard (DEVELOPERS.md)
                stride = chunk.itemsize
                shape = (len(chunk) - length + 1, length)
                view = np.ndarray(shape, chunk.dtype, buffer=chunk, strides=(stride, stride))
                view.flags.writeable = False
            else:
                view = sliding_window_view(chunk, length)
            views[c] = view
        return view

    def _fill(self, a: int, out: np.ndarray) -> None:
        """Copy tokens [a, a + len(out)) into ``out``, chunk by chunk."""
        pos, filled, need = a, 0, len(out)
        c = int(np.searchsorted(self._offsets, a, side="right")) - 1
        while filled < need:
            local = pos - int(self._offsets[c])
            take = min(need - filled, len(self._chunks[c]) - local)
            if take > 0:
                out[filled : filled + take] = self._chunks[c][local : local + take]
                filled += take
                pos += take
            c += 1

    def gather(self, starts: np.ndarray, length: int, out_dtype: Any = np.int64) -> np.ndarray:
        """Rows ``stream[start:start + length]`` for each start, shape ``(len(starts), length)``.

        Rows inside one chunk are read with one fancy index per chunk over a sliding-window view
        (no per-token Python work); only rows that cross a chunk boundary are stitched one by one.
        Raises StreamError when a row would leave the stream.
        """
        if isinstance(length, bool) or not isinstance(length, (int, np.integer)) or length < 0:
            raise StreamError(f"length: expected an integer >= 0, got {length!r}")
        length = int(length)
        s = _as_offsets(starts, "starts")
        dtype = np.dtype(out_dtype)
        n = len(s)
        if n == 0 or length == 0:
            self._check_range(s, length)
            return np.empty((n, length), dtype=dtype)
        offsets = self._offsets
        first = np.searchsorted(offsets, s, side="right") - 1
        last = np.searchsorted(offsets, s + (length - 1), side="right") - 1
        # the chunk lookup doubles as the bounds check: -1 is before the stream, n_chunks past it
        c_lo, c_hi = int(first.min()), int(last.max())
        if c_lo < 0 or c_hi >= len(self._chunks):
            self._check_range(s, length)
        if c_lo == c_hi:
            # the common case: one chunk holds every row; a single gather, cast only if needed
            rows: np.ndarray = self._window_view(c_lo, length)[s - offsets[c_lo]]
            return rows if rows.dtype == dtype else rows.astype(dtype)
        inside = first == last
        key = first if inside.all() else np.where(inside, first, c_hi + 1)
        order = np.argsort(key, kind="stable")
        local = (s - offsets[first])[order]
        # edges[i]:edges[i+1] are the sorted rows of chunk c_lo + i; rows past edges[-1] cross chunks
        edges = np.searchsorted(key[order], np.arange(c_lo, c_hi + 2)).tolist()
        parts = [
            self._window_view(c_lo + i, length)[local[edges[i] : edges[i + 1]]]  # one gather per chunk
            for i in range(len(edges) - 1)
            if edges[i + 1] > edges[i]
        ]
        out = np.empty((n, length), dtype=dtype)
        if parts:
            # one scatter (and cast) for all chunks: cheaper than one per chunk at a dozen shards
            out[order[: edges[-1]]] = parts[0] if len(parts) == 1 else np.concatenate(parts)
        for r in order[edges[-1] :].tolist():  # only rows that span chunks
            self._fill(int(s[r]), out[r])
        return out

    def slice(self, a: int, b: int) -> np.ndarray:
        """A copy of tokens ``[a, b)`` in the stream's dtype, read across chunks."""
        a, b = int(a), int(b)
        if not 0 <= a <= b <= len(self):
            raise StreamError(f"slice [{a}, {b}) is outside the stream of {len(self)} tokens")
        out = np.empty(b - a, dtype=self._dtype)
        self._fill(a, out)
        return out

    def boundary_mask(self, starts: np.ndarray, length: int) -> np.ndarray:
        """Bool ``(len(starts), length - 1)``: True at j when token ``start + j + 1`` begins a document.

        For a window of ``length`` tokens read as inputs ``[:-1]`` and targets ``[1:]``, True marks
        the positions whose input and target belong to different documents.
        """
        if self._doc_starts is None:
            raise StreamError("boundary_mask: this stream has no document offsets (doc_starts=None)")
        if isinstance(length, bool) or not isinstance(length, (int, np.integer)) or length < 1:
            raise StreamError(f"length: expected a positive integer, got {length!r}")
        length = int(length)
        s = _as_offsets(starts, "starts")
        self._check_range(s, length)
        mask = np.zeros((len(s), length - 1), dtype=bool)
        if len(s) == 0 or length == 1:
            return mask
        ds = self._doc_starts
        # document starts p with start + 1 <= p <= start + length - 1, found per row by bisection
        lo = np.searchsorted(ds, s + 1, side="left")
        hi = np.searchsorted(ds, s + (length - 1), side="right")
        counts = hi - lo
        total = int(counts.sum())
        if total:
            row = np.repeat(np.arange(len(s)), counts)
            first_of_row = np.cumsum(counts) - counts
            k = np.arange(total) - np.repeat(first_of_row, counts) + np.repeat(lo, counts)
            mask[row, ds[k] - s[row] - 1] = True
        return mask
