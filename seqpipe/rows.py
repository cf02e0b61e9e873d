"""Rows that follow documents: positions within documents, documents as rows, the evaluation pass.

Three pieces used by :class:`seqpipe.windows.BatchStream`:

* :func:`row_positions` - per row cell, which document it belongs to (numbered within the row from
  0) and its position within that document, from the stored document starts by bisection;
  :func:`attention_mask` turns the document numbers into a block-diagonal mask.
  :class:`PositionPage` gives the same for full windows from one bisection per row, found for
  several batches at once when a stream is read in order.
* :class:`DocumentRows` - order ``documents``: each document cut into pieces of at most
  ``window + 1`` tokens (inputs ``[:-1]``, targets ``[1:]``); piece ``k`` starts at token
  ``k * window`` of its document, so consecutive pieces share one token and every target of the
  document is in exactly one piece. Row ``r`` of the epoch is found from the cumulative piece
  counts (one bisection), so any row is computed directly.
* :class:`EvaluationRows` - order ``evaluation``: windows at ``k * stride`` from offset 0, the
  first scoring all its targets and each later one only the ``stride`` targets no earlier window
  scored, so every target of the split is scored exactly once.

Rows shorter than ``window + 1`` tokens are filled with the padding id; ``loss_mask`` is True
exactly on real targets that count.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqpipe.errors import StreamError
from seqpipe.stream import TokenStream


def distinct_starts(doc_starts: np.ndarray | None) -> np.ndarray:
    """Document starts without repeats (an empty document shares its start with the next one)."""
    if doc_starts is None or doc_starts.size == 0:
        return np.zeros(1, np.int64)
    ds = doc_starts.astype(np.int64, copy=False)
    if ds.size > 1 and bool(np.any(ds[1:] == ds[:-1])):
        ds = np.unique(ds)
    # tokens before the first listed start form a document of their own
    return ds if ds[0] == 0 else np.concatenate([np.zeros(1, np.int64), ds])


def row_positions(
    starts_unique: np.ndarray, cells: np.ndarray, real: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """``(doc_index, doc_position)`` for token offsets ``cells`` of shape ``(rows, T)``.

    ``doc_index`` numbers the documents met along each row from 0; ``doc_position`` is the
    offset within the token's document (0 at a document start). Cells where ``real`` is False
    (padding) get document -1 and position 0.
    """
    d = np.searchsorted(starts_unique, cells, side="right") - 1
    doc_index = d - d[:, :1]
    doc_position = cells - starts_unique[d]
    if real is not None:
        doc_index[~real] = -1
        doc_position[~real] = 0
    return doc_index, doc_position


def attention_mask(doc_index: np.ndarray, *, causal: bool = True) -> np.ndarray:
    """Bool ``(..., T, T)``: True where query ``i`` may attend to key ``j`` of the same row.

    Block-diagonal: ``i`` and ``j`` must share a document (``doc_index`` of one row ``(T,)`` or a
    batch ``(rows, T)``); with ``causal=True`` (the default) also ``j <= i``. Padding cells
    (document -1) form one block of their own, so no query row is all False.
    """
    doc = np.asarray(doc_index)
    if doc.ndim < 1 or not np.issubdtype(doc.dtype, np.integer):
        raise StreamError(f"doc_index: expected an integer array of shape (..., T), got {doc.dtype} {doc.shape}")
    mask: np.ndarray = doc[..., :, None] == doc[..., None, :]
    if causal:
        t = doc.shape[-1]
        mask &= np.tri(t, t, dtype=bool)
    return mask


def padded_rows(
    stream: TokenStream, starts: np.ndarray, real: np.ndarray, width: int, pad: int
) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``stream[s : s + n]`` filled with ``pad`` to ``width`` tokens, shape ``(rows, width)``.

    Every row is read with one windowed gather; rows that would leave the stream are read from
    an earlier start and shifted back, so the stream is never read past its end. Also returns
    the padding mask (True on filled cells), from which the loss mask is cut.
    """
    n_tok = len(stream)
    cols = np.arange(width, dtype=np.int64)
    if n_tok >= width:
        first = np.minimum(starts, n_tok - width)
        block = stream.gather(first, width, stream.dtype)
        shift = starts - first
        moved = np.flatnonzero(shift)
        if moved.size:  # only rows at the very end of the stream
            col = np.minimum(shift[moved, None] + cols, width - 1)
            block[moved] = np.take_along_axis(block[moved], col, axis=1)
    else:
        whole = np.zeros(width, stream.dtype)
        whole[:n_tok] = stream.slice(0, n_tok)
        block = whole[np.minimum(starts[:, None] + cols, width - 1)]
    padding = prefix_mask(real, width, inverse=True)
    if padding.any():
        np.copyto(block, pad, where=padding)
    return block, padding


def prefix_mask(lengths: np.ndarray, width: int, *, inverse: bool = False) -> np.ndarray:
    """Bool ``(rows, width)``: True on the first ``lengths[r]`` cells of row ``r`` (False with ``inverse``).

    Built as one ``np.repeat`` of alternating runs: cheaper than comparing a column range
    against every row, which numpy evaluates as a broadcast.
    """
    rows = len(lengths)
    head = np.minimum(lengths, width)  # lengths are token counts (>= 0): only the top needs a bound
    runs = np.empty(2 * rows, np.int64)
    runs[0::2] = head
    np.subtract(width, head, out=runs[1::2])
    values = np.zeros(2 * rows, bool)
    values[int(inverse) :: 2] = True
    return np.repeat(values, runs).reshape(rows, width)


@dataclass(frozen=True, slots=True)
class Rows:
    """Rows of one batch: start offsets, real tokens per row (<= window + 1), loss mask, positions."""

    starts: np.ndarray
    real: np.ndarray
    first_position: np.ndarray  # position within its document of each row's first token, or of k * stride


class DocumentRows:
    """Order ``documents``: row ``r`` is piece ``k`` of document ``d`` (see the module docstring)."""

    __slots__ = ("count", "cum", "lengths", "pieces", "starts", "window")

    def __init__(self, stream: TokenStream, window: int) -> None:
        if stream.doc_starts is None:
            raise StreamError("order: 'documents' needs the stream's document offsets (doc_starts)", key="order")
        self.window = window
        self.starts = distinct_starts(stream.doc_starts)
        self.lengths = np.diff(np.append(self.starts, len(stream)))
        # a document of L tokens has L - 1 targets: ceil((L - 1) / T) pieces, and at least one
        self.pieces = np.where(self.lengths > 0, np.maximum(1, -(-(self.lengths - 1) // window)), 0)
        self.cum = np.cumsum(self.pieces)
        self.count = int(self.cum[-1]) if self.cum.size else 0

    def locate(self, rows: np.ndarray) -> Rows:
        """Start, real token count and piece offset of epoch rows ``rows`` (int64)."""
        doc = np.searchsorted(self.cum, rows, side="right")
        piece = rows - (self.cum[doc] - self.pieces[doc])
        within = piece * self.window
        start = self.starts[doc] + within
        real = np.minimum(self.window + 1, self.lengths[doc] - within)
        return Rows(starts=start, real=real, first_position=within)


class EvaluationRows:
    """Order ``evaluation``: window ``k`` starts at ``k * stride``; every target scored once."""

    __slots__ = ("count", "n_tokens", "stride", "window")

    def __init__(self, n_tokens: int, window: int, stride: int) -> None:
        self.window, self.stride, self.n_tokens = window, stride, n_tokens
        targets = max(0, n_tokens - 1)
        self.count = 0 if targets == 0 else 1 + -(-max(0, targets - window) // stride)

    def locate(self, rows: np.ndarray) -> Rows:
        """Start and real token count of windows ``rows``."""
        start = rows * self.stride
        return Rows(starts=start, real=np.minimum(self.window + 1, self.n_tokens - start), first_position=start)

    def loss_mask(self, rows: np.ndarray, real: np.ndarray, width: int) -> np.ndarray:
        """True on targets this window is the first to score (and that are not padding)."""
        cols = np.arange(width)
        mask = prefix_mask(real - 1, width)
        # window k > 0 repeats the targets of window k - 1 but its last ``stride``
        mask &= (rows[:, None] == 0) | (cols >= width - self.stride)
        return mask


def documents_loss_mask(rows: Rows, padding: np.ndarray, mask_continued: bool) -> np.ndarray:
    """True on real targets; with ``mask_continued`` False on the first target of a continued piece.

    ``padding`` is the mask :func:`padded_rows` returned for the rows of ``width + 1`` tokens:
    target ``j`` is real exactly when token ``j + 1`` is.
    """
    mask = ~padding[:, 1:]  # a new C-contiguous array
    width = mask.shape[1]
    if mask_continued and width:
        mask[:, 0] &= rows.first_position == 0
    return mask


def narrow_starts(starts_unique: np.ndarray) -> np.ndarray:
    """``starts_unique`` as int32 when every value fits (the form :meth:`PositionPage.of` searches fastest)."""
    if len(starts_unique) and int(starts_unique[-1]) < 2**31 - 1:
        return starts_unique.astype(np.int32)
    return starts_unique


@dataclass(frozen=True, slots=True)
class PositionPage:
    """Where documents start in the rows of several batches of ``rows`` full windows each, as
    segments: one per document piece met along a row.

    The batch read row after row is a run of segments: the document met at column 0 of each row,
    then one per document start inside the row (located as in ``TokenStream.boundary_mask``). A
    cell's document number is its segment's number within the row and its position is its flat
    cell number (within its batch) minus the segment's ``offset``, so both outputs of a batch are
    one ``np.repeat`` of a per-segment value. Finding the segments costs some twenty small numpy
    calls whatever the number of rows, so a stream read in order finds them for several batches
    at once (:meth:`of`) and :meth:`take` writes out one batch.
    """

    rows: int
    width: int
    first: np.ndarray  # per batch, its first segment (one more entry: the total)
    within: np.ndarray  # per segment, its document number within its row
    offset: np.ndarray  # per segment, flat cell number (within its batch) of its document's token 0
    run: np.ndarray  # per segment, its cells

    @classmethod
    def of(cls, starts_unique: np.ndarray, starts: np.ndarray, rows: int, width: int) -> PositionPage:
        """The segments of windows ``[s, s + width)`` for ``starts``, ``rows`` per batch
        (``starts_unique`` as :func:`distinct_starts` gives them, int64, or int32 when they fit:
        half the memory the bisections read)."""
        ds = starts_unique
        n = len(starts)
        if n == 0:  # a rank may get no rows of the last batch
            empty = np.zeros(0, np.int64)
            return cls(rows, width, np.zeros(2, np.int64), empty, empty, empty)
        before = ds.searchsorted(starts.astype(ds.dtype, copy=False), side="right")
        before -= 1  # the document at column 0 of each row: ds[before] <= start < ds[before + 1]
        # document starts inside a row: the next few starts after ``before`` are read in one gather
        # (their memory was just read by the bisection); rows with more are bisected
        last = starts + (width - 1)
        inside = np.less_equal(ds.take(before[:, None] + _PROBE, mode="clip"), last[:, None]).sum(axis=1)
        more = np.flatnonzero(inside == len(_PROBE))
        if len(more):
            inside[more] = ds.searchsorted(last[more].astype(ds.dtype), side="right") - 1 - before[more]
        per_row = inside
        per_row += 1  # segments of a row: that document and one per start inside it
        seg_row = _cell_numbers(n).repeat(per_row)
        first_seg = per_row.cumsum()
        first_seg -= per_row
        within = _cell_numbers(len(seg_row)) - first_seg[seg_row]
        # over the whole page, the flat cell number of a segment's token at stream offset x is x + shift
        shift = _cell_numbers(n) * width
        shift -= starts
        offset = shift[seg_row]
        offset += ds[before[seg_row] + within]
        flat_start = np.maximum(offset, seg_row * width)  # the first segment of a row starts at its column 0
        run = np.empty_like(flat_start)
        np.subtract(flat_start[1:], flat_start[:-1], out=run[:-1])
        run[-1] = n * width - flat_start[-1]
        if n > rows:  # flat cell numbers counted within each segment's batch
            offset -= seg_row // rows * (rows * width)
        first = np.append(first_seg[::rows], len(seg_row))
        return cls(rows, width, first, within, offset, run)

    @property
    def batches(self) -> int:
        return len(self.first) - 1

    def take(self, k: int) -> tuple[np.ndarray, np.ndarray]:
        """``(doc_index, doc_position)``, each ``(rows, width)`` int64, of batch ``k`` of the page."""
        lo, hi = self.first[k : k + 2].tolist()
        width = self.width
        if lo == hi:
            return np.zeros((0, width), np.int64), np.zeros((0, width), np.int64)
        run = self.run[lo:hi]
        doc_index = self.within[lo:hi].repeat(run)
        doc_position = self.offset[lo:hi].repeat(run)
        np.subtract(_cell_numbers(len(doc_position)), doc_position, out=doc_position)
        shape = (len(doc_position) // width, width)
        return doc_index.reshape(shape), doc_position.reshape(shape)


_PROBE = np.arange(1, 9, dtype=np.int64)  # document starts after a row's first read by gather, not bisection
_COUNTING = np.arange(0, dtype=np.int64)


def _cell_numbers(size: int) -> np.ndarray:
    """``arange(size)`` as int64: a read-only view of one shared buffer that grows by doubling
    (each batch asks for a few sizes: rows, segments, cells)."""
    global _COUNTING
    cells = _COUNTING
    if len(cells) < size:
        cells = np.arange(max(size, 2 * len(cells)), dtype=np.int64)
        cells.flags.writeable = False
        _COUNTING = cells  # one assignment: a thread holding the old buffer still has a valid one
    return cells[:size]
