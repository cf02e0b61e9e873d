"""What the report reads from a dataset: each split's ids and its documents' content ranges.

The report works on any object with the attributes of :class:`seqpipe.dataset.Dataset`
that it uses (:class:`DatasetLike`), so it runs on a built dataset directory and on
the tests' in-memory stand-in alike.

A document's row in the documents table spans its begin/end markers when the build adds
them; the report strips a leading begin id and a trailing end id per document and
calls what is left the document's *content*.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final, Protocol

import numpy as np
import pyarrow as pa

from seqpipe.errors import DatasetError, SeqpipeError
from seqpipe.report.ngrams import content_mask
from seqpipe.tokenizers.base import Encoder
from seqpipe.vocab import Vocabulary


class SplitLike(Protocol):
    """The parts of a dataset split the report reads."""

    @property
    def stream(self) -> Any: ...  # a TokenStream (len + slice) or a numpy array

    @property
    def documents(self) -> pa.Table: ...


class DatasetLike(Protocol):
    """The parts of a dataset the report reads."""

    @property
    def fingerprint(self) -> str: ...

    @property
    def vocabulary(self) -> Vocabulary: ...

    @property
    def encoder(self) -> Encoder: ...

    @property
    def splits(self) -> tuple[str, ...]: ...

    def split(self, name: str) -> SplitLike: ...


@dataclass(frozen=True, slots=True)
class Roles:
    """Special ids of the vocabulary (None where the recipe sets no such token)."""

    unknown: int | None
    padding: int | None
    begin: int | None
    end: int | None
    n_reserved: int
    vocab_size: int

    @classmethod
    def of(cls, vocab: Vocabulary) -> Roles:
        roles: Mapping[str, int] = vocab.roles
        return cls(
            unknown=roles.get("unknown"),
            padding=roles.get("padding"),
            begin=roles.get("begin"),
            end=roles.get("end"),
            n_reserved=int(vocab.n_reserved),
            vocab_size=len(vocab),
        )

    @property
    def markers(self) -> tuple[int, ...]:
        """Ids that delimit documents rather than stand for text."""
        return tuple(i for i in (self.begin, self.end, self.padding) if i is not None)


@dataclass(frozen=True, slots=True)
class SplitTokens:
    """One split's stream and, per document, its row span and content span."""

    name: str
    ids: np.ndarray  # the split's whole token stream
    starts: np.ndarray  # int64, documents table ``start``
    lengths: np.ndarray  # int64, documents table ``length`` (markers included)
    content_starts: np.ndarray  # int64
    content_lengths: np.ndarray  # int64
    has_end: np.ndarray  # bool: the document ends with the end marker

    @property
    def num_documents(self) -> int:
        return len(self.starts)

    @property
    def num_tokens(self) -> int:
        return len(self.ids)

    def content_ids(self) -> np.ndarray:
        """All content tokens of the split (markers dropped), in stream order."""
        out: np.ndarray = self.ids[content_mask(len(self.ids), self.content_starts, self.content_lengths)]
        return out


def _stream_ids(stream: Any, name: str) -> np.ndarray:
    if isinstance(stream, np.ndarray):
        return stream
    try:
        size = len(stream)
        ids = stream.slice(0, size) if hasattr(stream, "slice") else np.asarray(stream)
    except (OSError, ValueError, TypeError) as exc:
        raise DatasetError(f"split {name!r}: cannot read its token stream ({exc})") from exc
    return np.asarray(ids)


def _column(table: pa.Table, key: str, name: str) -> np.ndarray:
    if key not in table.column_names:
        raise DatasetError(
            f"split {name!r}: the documents table has no {key!r} column (columns: {', '.join(table.column_names)})"
        )
    col = table.column(key)
    if col.null_count:
        raise DatasetError(f"split {name!r}: the documents table has nulls in {key!r}")
    return np.asarray(col.to_numpy(), dtype=np.int64)


def load_split(dataset: DatasetLike, name: str, roles: Roles) -> SplitTokens:
    """Read split ``name`` and find each document's content (markers stripped)."""
    split = dataset.split(name)
    ids = _stream_ids(split.stream, name)
    docs = split.documents
    starts = _column(docs, "start", name)
    lengths = _column(docs, "length", name)
    ends = starts + lengths
    if len(starts) and (
        starts.min() < 0 or lengths.min() < 0 or ends.max() > len(ids) or (starts[1:] < ends[:-1]).any()
    ):
        raise DatasetError(
            f"split {name!r}: document ranges are out of order, overlap, or run past "
            f"the {len(ids)}-token stream; run 'seqpipe verify' on the dataset"
        )
    content_starts, content_lengths, has_end = _content_spans(ids, starts, lengths, roles)
    return SplitTokens(
        name=name,
        ids=ids,
        starts=starts,
        lengths=lengths,
        content_starts=content_starts,
        content_lengths=content_lengths,
        has_end=has_end,
    )


# Tokens per group of whole documents the report reads at once: bounds every per-token
# temporary, so the report's memory does not grow with the split (only its count tables do).
CHUNK_TOKENS: Final = 1 << 20


@dataclass(frozen=True, slots=True)
class SplitShape:
    """One split's size and, per document, its row span and content span (no token ids)."""

    name: str
    num_tokens: int
    starts: np.ndarray
    lengths: np.ndarray
    content_starts: np.ndarray
    content_lengths: np.ndarray
    has_end: np.ndarray

    @property
    def num_documents(self) -> int:
        return len(self.starts)


def _is_built(split: Any) -> bool:
    """True for a split of a dataset directory (its shards are read one range at a time)."""
    from seqpipe.dataset import Split

    return isinstance(split, Split)


def stream_dtype(dataset: DatasetLike, name: str) -> np.dtype[Any]:
    """The id type of split ``name``'s stream, read without mapping its shards."""
    split = dataset.split(name)
    if _is_built(split):
        return np.dtype(split.dataset.manifest["dtype"])  # type: ignore[attr-defined]
    stream = split.stream
    return np.dtype(stream.dtype if hasattr(stream, "dtype") else np.asarray(stream).dtype)


def _stream_length(split: Any, name: str) -> int:
    if _is_built(split):
        return int(split.num_tokens)
    try:
        return len(split.stream)
    except (OSError, ValueError, TypeError) as exc:
        raise DatasetError(f"split {name!r}: cannot read its token stream ({exc})") from exc


def _ranges(dataset: DatasetLike, name: str) -> tuple[np.ndarray, np.ndarray, int]:
    """Split ``name``'s document starts and lengths (checked) and its stream's length."""
    split = dataset.split(name)
    n_tokens = _stream_length(split, name)
    docs = split.documents
    starts = _column(docs, "start", name)
    lengths = _column(docs, "length", name)
    ends = starts + lengths
    if len(starts) and (
        starts.min() < 0 or lengths.min() < 0 or ends.max() > n_tokens or (starts[1:] < ends[:-1]).any()
    ):
        raise DatasetError(
            f"split {name!r}: document ranges are out of order, overlap, or run past "
            f"the {n_tokens}-token stream; run 'seqpipe verify' on the dataset"
        )
    return starts, lengths, n_tokens


def chunk_bounds(starts: np.ndarray, lengths: np.ndarray, size: int = CHUNK_TOKENS) -> list[int]:
    """Document indexes where groups of about ``size`` tokens begin and end (a document never cut):
    a new group starts after the document in which the running token count passes a multiple of size."""
    n = len(starts)
    if n == 0:
        return [0, 0]
    ends = starts + lengths
    span = int(ends[-1] - starts[0])
    cuts = np.unique(np.searchsorted(ends - starts[0], np.arange(size, span, size)))
    return [0, *(int(c) + 1 for c in cuts if int(c) + 1 < n), n]


class _ShardFile:
    """The ids of one built shard, read range by range with plain file reads.

    A memory-mapped shard's pages count as the process's memory once touched and stay so
    until it is unmapped; reading each range into a fresh array keeps the report's peak memory
    at one range, whatever the split's size. A compressed shard is held decompressed."""

    __slots__ = ("_dtype", "_held", "_path", "_pieces")

    def __init__(self, path: Path, dtype: np.dtype[Any], tokens: int) -> None:
        from seqpipe.shards import read_shard

        self._path, self._dtype = path, dtype
        view = read_shard(path, dtype=dtype, expected_tokens=tokens)  # checks format, type and length
        self._pieces = _file_pieces(path, dtype)
        self._held: np.ndarray | None = None if self._pieces is not None else np.array(view)

    def read(self, lo: int, hi: int) -> np.ndarray:
        if self._held is not None:
            return self._held[lo:hi]
        out = []
        with open(self._path, "rb") as fh:
            for first, offset, count in self._pieces or ():
                a, b = max(lo, first), min(hi, first + count)
                if a < b:
                    fh.seek(offset + (a - first) * self._dtype.itemsize)
                    out.append(np.fromfile(fh, dtype=self._dtype, count=b - a))
        if not out:
            return np.zeros(0, dtype=self._dtype)
        return np.concatenate(out) if len(out) != 1 else out[0]


def _file_pieces(path: Path, dtype: np.dtype[Any]) -> list[tuple[int, int, int]] | None:
    """Per record batch of an uncompressed shard: (first id's index, its byte offset in the file,
    ids); None when a batch's ids are not stored as they are (compressed)."""
    try:
        source = pa.memory_map(str(path), "r")
        whole = source.read_buffer(source.size())
        reader = pa.ipc.open_file(source)
        out, first = [], 0
        for i in range(reader.num_record_batches):
            col = reader.get_record_batch(i).column(0)
            offset = col.buffers()[1].address + col.offset * dtype.itemsize - whole.address
            if not 0 <= offset <= whole.size - len(col) * dtype.itemsize:
                return None
            out.append((first, offset, len(col)))
            first += len(col)
        return out
    except (pa.ArrowException, OSError, ValueError, IndexError, AttributeError):
        return None


class _Reader:
    """Ranges of one split's stream, asked for in increasing order."""

    __slots__ = ("_entries", "_files", "_name", "_offsets", "_split")

    def __init__(self, dataset: DatasetLike, name: str) -> None:
        self._split, self._name = dataset.split(name), name
        self._files: dict[int, _ShardFile] = {}
        self._entries = len(dataset.vocabulary)
        self._offsets = np.zeros(1, np.int64)
        if _is_built(self._split):
            tokens = [int(sh["tokens"]) for sh in self._split.info["shards"]]  # type: ignore[attr-defined]
            self._offsets = np.concatenate([[0], np.cumsum(tokens, dtype=np.int64)])

    def read(self, lo: int, hi: int) -> np.ndarray:
        if not _is_built(self._split):
            return _stream_ids_range(self._split.stream, self._name, lo, hi)
        pieces = []
        for j in range(max(int(np.searchsorted(self._offsets, lo, side="right")) - 1, 0), len(self._offsets) - 1):
            a = int(self._offsets[j])
            if a >= hi:
                break
            pieces.append(self._file(j).read(max(lo - a, 0), hi - a))
        for j in [j for j in self._files if self._offsets[j + 1] <= hi]:
            del self._files[j]  # shards are read in order: one wholly before this range is done
        if not pieces:
            return np.zeros(0, dtype=np.dtype(self._split.dataset.manifest["dtype"]))  # type: ignore[attr-defined]
        ids = np.concatenate(pieces) if len(pieces) != 1 else pieces[0]
        if len(ids) and self._entries <= np.iinfo(ids.dtype).max and int(ids.max()) >= self._entries:
            raise DatasetError(
                f"split {self._name!r}: holds id {int(ids.max())}, but the vocabulary has {self._entries} entries; "
                "run 'seqpipe verify' on the dataset, then rebuild it"
            )
        return ids

    def _file(self, j: int) -> _ShardFile:
        if j not in self._files:
            from seqpipe.manifest import safe_relative

            split: Any = self._split
            sh = split.info["shards"][j]
            path = safe_relative(split.dataset.directory, sh["path"], key=f"splits.{self._name}.shards[{j}].path")
            self._files[j] = _ShardFile(path, np.dtype(split.dataset.manifest["dtype"]), int(sh["tokens"]))
        return self._files[j]


def _stream_ids_range(stream: Any, name: str, lo: int, hi: int) -> np.ndarray:
    if isinstance(stream, np.ndarray):
        return stream[lo:hi]
    try:
        ids = stream.slice(lo, hi) if hasattr(stream, "slice") else np.asarray(stream)[lo:hi]
    except (OSError, ValueError, TypeError, SeqpipeError) as exc:
        raise DatasetError(f"split {name!r}: cannot read its token stream ({exc})") from exc
    return np.asarray(ids)


def _content_spans(
    ids: np.ndarray, starts: np.ndarray, lengths: np.ndarray, roles: Roles
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Content starts, content lengths and has-end flags of documents whose ranges index ``ids``."""
    ends = starts + lengths
    last = max(len(ids) - 1, 0)
    has_begin = np.zeros(len(starts), dtype=bool)
    if roles.begin is not None and len(ids):
        has_begin = (lengths > 0) & (ids[np.minimum(starts, last)] == roles.begin)
    has_end = np.zeros(len(starts), dtype=bool)
    if roles.end is not None and len(ids):
        has_end = (lengths > has_begin) & (ids[np.clip(ends - 1, 0, last)] == roles.end)
    return starts + has_begin, lengths - has_begin - has_end, has_end


def read_chunks(
    dataset: DatasetLike, name: str, roles: Roles, *, dtype: np.dtype[Any] | None = None, size: int = CHUNK_TOKENS
) -> Iterator[SplitTokens]:
    """Split ``name`` as consecutive groups of whole documents of about ``size`` tokens (the
    groups of :func:`seqpipe.report.lm.chunks`); each group's ``ids`` run from its first
    document's start to its last one's end, in ``dtype`` (default: the stream's own)."""
    starts, lengths, _ = _ranges(dataset, name)
    reader = _Reader(dataset, name)
    bounds = chunk_bounds(starts, lengths, size)
    for a, b in itertools.pairwise(bounds):
        if a == b and len(starts):
            continue
        lo = int(starts[a]) if len(starts) else 0
        hi = int(starts[b - 1] + lengths[b - 1]) if len(starts) else 0
        ids = reader.read(lo, hi)
        if dtype is not None and ids.dtype != dtype:  # one dtype, so document hashes compare across splits
            ids = ids.astype(dtype)
        s, m = starts[a:b] - lo, lengths[a:b]
        content_starts, content_lengths, has_end = _content_spans(ids, s, m, roles)
        yield SplitTokens(name, ids, s, m, content_starts, content_lengths, has_end)


def scan_split(dataset: DatasetLike, name: str, roles: Roles, dtype: np.dtype[Any]) -> tuple[SplitShape, np.ndarray]:
    """One pass over split ``name``: its shape and the occurrences of each id among its content
    tokens (markers excluded), counted chunk by chunk."""
    starts, lengths, n_tokens = _ranges(dataset, name)
    counts = np.zeros(roles.vocab_size, dtype=np.int64)
    content_starts, content_lengths, has_end = [], [], []
    done = 0
    for chunk in read_chunks(dataset, name, roles, dtype=dtype):
        found = np.bincount(chunk.content_ids(), minlength=roles.vocab_size)
        if len(found) > len(counts):  # an id past the vocabulary: kept, as a whole-split count keeps it
            counts = np.concatenate([counts, np.zeros(len(found) - len(counts), np.int64)])
        counts[: len(found)] += found
        offset = int(starts[done]) if chunk.num_documents else 0
        done += chunk.num_documents
        content_starts.append(chunk.content_starts + offset)
        content_lengths.append(chunk.content_lengths)
        has_end.append(chunk.has_end)
    shape = SplitShape(
        name=name,
        num_tokens=n_tokens,
        starts=starts,
        lengths=lengths,
        content_starts=np.concatenate(content_starts) if content_starts else starts,
        content_lengths=np.concatenate(content_lengths) if content_lengths else lengths,
        has_end=np.concatenate(has_end) if has_end else np.zeros(0, dtype=bool),
    )
    return shape, counts
