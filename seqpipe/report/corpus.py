"""What the report reads from a dataset: each split's ids and its documents' content ranges.

The report works on any object with the attributes of :class:`seqpipe.dataset.Dataset`
that it uses (:class:`DatasetLike`), so it runs on a built dataset directory and on
the tests' in-memory stand-in alike.

A document's row in the documents table spans its begin/end markers when the build adds
them; the report strips a leading begin id and a trailing end id per document and
calls what is left the document's *content*.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import pyarrow as pa

from seqpipe.errors import DatasetError
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
    last = max(len(ids) - 1, 0)
    has_begin = np.zeros(len(starts), dtype=bool)
    if roles.begin is not None and len(ids):
        has_begin = (lengths > 0) & (ids[np.minimum(starts, last)] == roles.begin)
    has_end = np.zeros(len(starts), dtype=bool)
    if roles.end is not None and len(ids):
        has_end = (lengths > has_begin) & (ids[np.clip(ends - 1, 0, last)] == roles.end)
    content_starts = starts + has_begin
    content_lengths = lengths - has_begin - has_end
    return SplitTokens(
        name=name,
        ids=ids,
        starts=starts,
        lengths=lengths,
        content_starts=content_starts,
        content_lengths=content_lengths,
        has_end=has_end,
    )
