"""The tokenizer interface every tokenizer kind implements.

A tokenizer works in two stages so that a build can count in parallel and
encode without a Python call per token:

1. ``segment(texts)`` cuts a batch of documents into *pieces* and returns them
   in dictionary form (:class:`Segments`): the distinct piece keys of the batch
   (bytes, in first-occurrence order), one int32 code per piece position, and
   the number of pieces per document. For character, byte and word tokenizers a
   piece is a token; for byte-pair encoding a piece is a pre-split chunk.
2. ``fit(counts, spec)`` turns corpus-wide piece counts (train split only) into
   an :class:`Encoder`: the fixed vocabulary, plus whatever the kind learns.

An :class:`Encoder` maps each distinct piece key to one or more ids
(``piece_ids``); :func:`expand` then turns a batch's codes into ids with numpy.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

if TYPE_CHECKING:
    from seqpipe.clean.base import CleanStep
    from seqpipe.vocab import VocabSpec, Vocabulary


@dataclass(frozen=True, slots=True)
class Segments:
    """A batch of documents cut into pieces, in dictionary form.

    ``keys[codes[j]]`` is piece ``j``; the first ``doc_lengths[0]`` pieces belong
    to document 0, and so on. ``keys`` holds each distinct piece once.
    """

    keys: pa.Array  # binary (or large_binary), distinct piece keys
    codes: np.ndarray  # int32, one per piece position
    doc_lengths: np.ndarray  # int64, pieces per document

    def __post_init__(self) -> None:
        if int(self.doc_lengths.sum()) != len(self.codes):
            raise ValueError("Segments: doc_lengths do not add up to the number of codes")


class Tokenizer(ABC):
    """A recipe-configured, not yet trained tokenizer."""

    kind: ClassVar[str]

    @abstractmethod
    def segment(self, texts: Sequence[str]) -> Segments:
        """Cut ``texts`` into pieces (see module docstring)."""

    @abstractmethod
    def fit(self, counts: pa.Table, spec: VocabSpec, *, show: bool = False) -> Encoder:
        """Train on corpus-wide piece counts (table ``key: binary, count: int64``); ``show``: a
        progress bar where training takes long."""

    @abstractmethod
    def load(self, directory: Path) -> Encoder:
        """Load the encoder a build stored in ``directory`` (see ``Encoder.save``)."""


class Encoder(ABC):
    """A trained tokenizer: a fixed vocabulary and the rule mapping pieces to ids."""

    tokenizer: Tokenizer
    vocabulary: Vocabulary
    # the cleaning steps of the dataset the encoder was loaded from (set by Dataset.encoder), so
    # encode() sees text as the build saw it; none for an encoder fitted outside a dataset
    cleaning: tuple[CleanStep, ...] = ()

    @abstractmethod
    def piece_ids(self, keys: pa.Array) -> tuple[np.ndarray, np.ndarray]:
        """Ids for each distinct piece key: ``(values, offsets)`` with
        ``values[offsets[i]:offsets[i+1]]`` the ids of ``keys[i]`` (offsets has len(keys)+1)."""

    @abstractmethod
    def decode(self, ids: Sequence[int] | np.ndarray, *, show_reserved: bool = False) -> str:
        """Text for a sequence of ids (reserved tokens are skipped unless ``show_reserved``)."""

    def save(self, directory: Path) -> list[str]:
        """Write any learned state besides the vocabulary into ``directory``;
        return the relative file names written (hashed into the manifest)."""
        return []

    def token_text(self, token_id: int) -> str:
        """A printable form of one token, for reports and the CLI."""
        tok = self.vocabulary.token(token_id)
        return tok.decode("utf-8", errors="backslashreplace")

    def encode_segments(self, seg: Segments) -> tuple[np.ndarray, np.ndarray]:
        """Ids for a segmented batch, and the number of ids per document."""
        values, offsets = self.piece_ids(seg.keys)
        return expand(values, offsets, seg.codes, seg.doc_lengths)

    def encode(self, text: str, *, clean: bool = True) -> np.ndarray:
        """Ids for one text (no begin/end markers). With ``clean`` (the default) the text first
        goes through the dataset's cleaning steps that rewrite text (lowercase, normalize, ...),
        as every document of the dataset did; ``clean=False`` encodes it as given."""
        if clean and self.cleaning:
            from seqpipe.clean import clean_text

            text = clean_text(self.cleaning, text)
        ids, _ = self.encode_segments(self.tokenizer.segment([text]))
        return ids

    def encode_batch(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """Ids for many texts, concatenated, and ids per text."""
        return self.encode_segments(self.tokenizer.segment(texts))


def expand(
    values: np.ndarray, offsets: np.ndarray, codes: np.ndarray, doc_lengths: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Turn piece codes into ids given per-key id runs, without a Python loop.

    Returns the flat ids (int64) and the number of ids per document.
    """
    values = np.asarray(values, dtype=np.int64)
    offsets = np.asarray(offsets, dtype=np.int64)
    lens = np.diff(offsets)
    if len(lens) == 0 or (lens == 1).all():
        # one id per piece: a single gather (codes index directly, whatever their int type)
        ids = values[codes] if len(codes) else np.zeros(0, np.int64)
        return ids, np.asarray(doc_lengths, dtype=np.int64).copy()
    codes = np.asarray(codes, dtype=np.int64)
    per_pos = lens[codes]
    total = int(per_pos.sum())
    starts = offsets[codes]
    # index of each output id: start of its piece's run plus its rank within the run
    run_start_out = np.cumsum(per_pos) - per_pos
    idx = np.repeat(starts - run_start_out, per_pos) + np.arange(total, dtype=np.int64)
    ids = values[idx]
    # ids per document: sum of per-position run lengths inside each document
    doc_ends = np.cumsum(np.asarray(doc_lengths, dtype=np.int64))
    cum = np.concatenate([[0], np.cumsum(per_pos)])
    ends = cum[doc_ends]
    starts_doc = np.concatenate([[0], ends[:-1]])
    return ids, (ends - starts_doc).astype(np.int64)


def reserved_piece_ids(vocabulary: Vocabulary, keys: pa.Array) -> np.ndarray:
    """Ids for piece keys where reserved names are their reserved ids and any other key is looked
    up among the ordinary tokens (misses become the unknown id)."""
    keys = keys.cast(pa.binary())
    pos = pc.index_in(keys, value_set=vocabulary.tokens.slice(0, vocabulary.n_reserved).cast(pa.binary()))
    hit = np.asarray(pos.is_valid().to_numpy(zero_copy_only=False), dtype=bool)
    ids = np.empty(len(keys), dtype=np.int64)
    if hit.any():
        ids[hit] = pos.filter(pa.array(hit)).to_numpy(zero_copy_only=False)
    if not hit.all():
        ids[~hit] = vocabulary.lookup(keys.filter(pa.array(~hit)))
    return ids


class VocabEncoder(Encoder):
    """Encoder for kinds whose pieces are whole tokens: one id per piece, unknown for misses."""

    def __init__(self, tokenizer: Tokenizer, vocabulary: Vocabulary) -> None:
        self.tokenizer = tokenizer
        self.vocabulary = vocabulary

    def piece_ids(self, keys: pa.Array) -> tuple[np.ndarray, np.ndarray]:
        if getattr(self.tokenizer, "literal_reserved", False):
            ids = reserved_piece_ids(self.vocabulary, keys)
        else:
            ids = self.vocabulary.lookup(keys)
        return ids, np.arange(len(ids) + 1, dtype=np.int64)

    def decode(self, ids: Sequence[int] | np.ndarray, *, show_reserved: bool = False) -> str:
        toks = self.vocabulary.tokens_for(ids, show_reserved=show_reserved)
        return self.join(toks)

    def join(self, tokens: list[bytes]) -> str:
        """Join token bytes into text; kinds override for separators."""
        return b"".join(tokens).decode("utf-8", errors="replace")
