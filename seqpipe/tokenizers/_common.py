"""Helpers shared by the vocabulary-based tokenizer kinds."""

from __future__ import annotations

import string
from collections.abc import Callable, Sequence
from functools import lru_cache
from pathlib import Path
from typing import Any, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import regex

from seqpipe._parse import parse_bool, parse_str_tuple
from seqpipe.errors import RecipeError, TokenizerError
from seqpipe.tokenizers.base import Segments
from seqpipe.vocab import VocabSpec, Vocabulary

DEFAULT_RESERVED: Final = VocabSpec().reserved


def as_string_array(texts: Sequence[str] | pa.Array) -> pa.Array:
    """Documents as a ``large_string`` Arrow array."""
    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks()
    if isinstance(texts, pa.Array):
        return texts if texts.type == pa.large_string() else texts.cast(pa.large_string())
    try:
        return pa.array(list(texts), pa.large_string())
    except UnicodeEncodeError as exc:
        raise TokenizerError(
            f"text contains a lone surrogate ({exc.object[exc.start : exc.end]!r}); it has no UTF-8 form"
        ) from None
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise TokenizerError(f"expected a sequence of strings ({exc})") from None


def segments_from_tokens(flat: pa.Array, doc_lengths: np.ndarray) -> Segments:
    """Dictionary-encode a flat token array (string or binary) into :class:`Segments`."""
    if len(flat) == 0:
        return Segments(pa.array([], pa.binary()), np.zeros(0, np.int32), doc_lengths.astype(np.int64))
    enc = pc.dictionary_encode(flat)
    keys = enc.dictionary.cast(pa.binary())
    codes = enc.indices.to_numpy(zero_copy_only=False).astype(np.int32, copy=False)
    return Segments(keys, codes, doc_lengths.astype(np.int64))


def stored_vocabulary(directory: Path) -> Vocabulary:
    """The vocabulary a build stored in ``directory`` (every kind keeps it in the same file)."""
    return Vocabulary.load(directory / "vocab.arrow")


@lru_cache(maxsize=16)
def reserved_splitter(names: tuple[str, ...]) -> Any:
    """A ``regex`` that splits text around literal reserved names (one capture group)."""
    # longest first, so a name that starts another name cannot shadow it
    alternatives = "|".join(regex.escape(n) for n in sorted(names, key=len, reverse=True))
    return regex.compile(f"({alternatives})")


def _split_at_names(
    texts: pa.Array, holds: np.ndarray, names: tuple[str, ...]
) -> tuple[pa.Array, np.ndarray, np.ndarray]:
    """The text between names (fragments, in order) and, per item (a fragment or a name), its
    document and its index into ``names`` (-1 for a fragment). Only the documents that hold a
    name are split in Python; every other document is one fragment, taken as it is."""
    splitter = reserved_splitter(names)
    name_index = {n: i for i, n in enumerate(names)}
    held = np.flatnonzero(holds)
    held_fragments: list[str] = []
    held_names: list[int] = []  # per item of the documents that hold a name
    held_items = np.empty(len(held), dtype=np.int64)
    for k, text in enumerate(texts.take(pa.array(held)).to_pylist()):
        parts = splitter.split(text)
        held_items[k] = len(parts)
        for j, part in enumerate(parts):
            held_names.append(name_index[part] if j % 2 else -1)
            if not j % 2:
                held_fragments.append(part)
    per_doc = np.ones(len(texts), dtype=np.int64)
    per_doc[held] = held_items
    item_doc = np.repeat(np.arange(len(texts), dtype=np.int64), per_doc)
    item_name = np.full(len(item_doc), -1, dtype=np.int64)
    first = np.cumsum(per_doc) - per_doc
    within = np.arange(int(held_items.sum()), dtype=np.int64) - np.repeat(
        np.cumsum(held_items) - held_items, held_items
    )
    item_name[np.repeat(first[held], held_items) + within] = held_names
    # fragments in item order: whole documents without a name, then the held ones' pieces
    frag_doc = item_doc[item_name < 0]
    from_held = holds[frag_doc]
    order = np.empty(len(frag_doc), dtype=np.int64)
    whole = int((~holds).sum())
    order[~from_held] = np.arange(whole, dtype=np.int64)
    order[from_held] = whole + np.arange(len(held_fragments), dtype=np.int64)
    pool = pa.concat_arrays(
        [texts.filter(pa.array(~holds)).cast(pa.large_string()), pa.array(held_fragments, pa.large_string())]
    )
    return pool.take(pa.array(order)), item_doc, item_name


@lru_cache(maxsize=16)
def _bytes_finder(names: tuple[str, ...]) -> Any:
    """:func:`reserved_splitter` over UTF-8 bytes: a literal's bytes match only at a code point
    boundary (no UTF-8 sequence starts with a continuation byte), so it finds the same names."""
    alternatives = b"|".join(regex.escape(n.encode()) for n in sorted(names, key=len, reverse=True))
    return regex.compile(alternatives)


def _cut_at_names(
    texts: pa.Array, holds: np.ndarray, names: tuple[str, ...]
) -> tuple[pa.Array, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_split_at_names` for a ``large_string`` array without nulls, over its UTF-8 bytes:
    the fragments are the batch's bytes less those of the names (one copy of the byte ranges
    between names), so no document is copied through Python or Arrow's take. Also returns the byte ranges of ``texts``
    the fragments keep, in order (one row ``(start, end)`` each, counted from the first
    document's start)."""
    n = len(texts)
    offsets = np.frombuffer(texts.buffers()[1], dtype=np.int64)[texts.offset : texts.offset + n + 1]
    base, end = int(offsets[0]), int(offsets[-1])
    raw = texts.buffers()[2]
    view = memoryview(raw if raw is not None else b"")
    finder, name_index = _bytes_finder(names), {name.encode(): i for i, name in enumerate(names)}
    spans: list[tuple[int, int]] = []
    span_name: list[int] = []
    found_in: list[int] = []
    for d in np.flatnonzero(holds).tolist():  # a Python call per document that holds a name only
        a = int(offsets[d])
        for m in finder.finditer(view[a : int(offsets[d + 1])]):
            spans.append((a + m.start() - base, a + m.end() - base))
            span_name.append(name_index[m.group()])
            found_in.append(d)
    span = np.array(spans, dtype=np.int64).reshape(-1, 2)
    span_doc = np.array(found_in, dtype=np.int64)
    per_doc = np.bincount(span_doc, minlength=n)  # names per document
    before = np.cumsum(per_doc) - per_doc  # names in earlier documents
    rank = np.arange(len(span), dtype=np.int64) - before[span_doc]  # a name's rank in its document
    # items per document: a fragment, then a name and a fragment per name
    item_doc = np.repeat(np.arange(n, dtype=np.int64), 2 * per_doc + 1)
    item_name = np.full(len(item_doc), -1, dtype=np.int64)
    item_name[2 * before[span_doc] + span_doc + 2 * rank + 1] = span_name
    # fragment starts: each document's start, and the end of each name (relative to ``base``)
    first = np.arange(n, dtype=np.int64) + before  # index of each document's first fragment
    start = np.empty(n + len(span), dtype=np.int64)
    start[first] = offsets[:-1] - base
    start[first[span_doc] + rank + 1] = span[:, 1]
    # name bytes before each fragment start: a start is never inside a name
    removed = np.cumsum(np.append(0, span[:, 1] - span[:, 0]))
    bounds = np.append(start - removed[np.searchsorted(span[:, 1], start, side="right")], end - base - removed[-1])
    kept = np.stack([np.append(0, span[:, 1]), np.append(span[:, 0], int(offsets[-1]) - base)], axis=1)
    data = np.frombuffer(view, dtype=np.uint8)[base : int(offsets[-1])] if end > base else np.zeros(0, np.uint8)
    fragments = pa.LargeStringArray.from_buffers(len(start), pa.py_buffer(bounds), pa.py_buffer(gather(data, kept)))
    return fragments, item_doc, item_name, kept


def gather(values: np.ndarray, ranges: np.ndarray) -> np.ndarray:
    """``values[a:b]`` for each row ``(a, b)`` of ``ranges``, joined (one copy; few ranges)."""
    return np.concatenate([values[a:b] for a, b in ranges.tolist()]) if len(ranges) else values[:0]


def _re2_literal(name: str) -> str:
    """``name`` as an RE2 pattern matching exactly its text (ASCII punctuation escaped)."""
    return "".join(f"\\{ch}" if ch in string.punctuation else ch for ch in name)


def _holding_a_name(texts: pa.Array, names: tuple[str, ...]) -> np.ndarray:
    """Per document: whether it holds any of ``names`` (one RE2 pass for all names, not one per name)."""
    try:
        found = pc.match_substring_regex(texts, "|".join(_re2_literal(n) for n in names))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):  # a name RE2 cannot spell: one scan per name
        holds = np.zeros(len(texts), dtype=bool)
        for name in names:
            holds |= np.asarray(pc.match_substring(texts, name).fill_null(False).to_numpy(zero_copy_only=False), bool)
        return holds
    return np.asarray(found.fill_null(False).to_numpy(zero_copy_only=False), dtype=bool)


def segment_with_reserved(
    segment: Callable[[pa.Array], Segments],
    texts: pa.Array,
    names: tuple[str, ...],
    seed: Callable[[pa.Array, pa.Array, np.ndarray], None] | None = None,
) -> Segments:
    """``segment(texts)``, except that each literal occurrence of a name in ``names`` is one
    piece whose key is the name's UTF-8 bytes (the encoder maps it to its reserved id).

    Only documents holding a name are split (one regex scan each); the text between names
    goes through ``segment`` as a batch of fragments, and the pieces are put back in order
    with numpy, so the kind's own segmentation is unchanged around the names. ``seed``, when
    given, is told (``texts``, the fragments, the byte ranges of ``texts`` they keep)
    before ``segment`` runs on the fragments, so a kind can carry over what it knows of
    ``texts`` byte by byte.
    """
    names = tuple(n for n in names if n)
    if not names or len(texts) == 0:
        return segment(texts)
    holds = _holding_a_name(texts, names)
    if not holds.any():
        return segment(texts)
    if texts.null_count or texts.type != pa.large_string():
        fragments, item_doc, item_name = _split_at_names(texts, holds, names)
    else:
        fragments, item_doc, item_name, kept = _cut_at_names(texts, holds, names)
        if seed is not None:
            seed(texts, fragments, kept)
    plain = segment(fragments)
    is_name = item_name >= 0
    per_item = np.ones(len(item_name), dtype=np.int64)
    per_item[~is_name] = plain.doc_lengths
    from_fragment = np.repeat(~is_name, per_item)
    codes = np.empty(int(per_item.sum()), dtype=np.int32)
    codes[from_fragment] = plain.codes
    # only the names that occur become keys (keys are the batch's distinct pieces)
    used, slot = np.unique(item_name[is_name], return_inverse=True)
    codes[~from_fragment] = len(plain.keys) + slot.astype(np.int32)
    named = pa.array([names[int(i)].encode() for i in used], pa.binary())
    keys = pa.concat_arrays([plain.keys.cast(pa.binary()), named])
    lengths = np.bincount(item_doc, weights=per_item, minlength=len(texts))
    return Segments(keys, codes, lengths.astype(np.int64))


def drop_reserved_counts(counts: pa.Table, names: tuple[str, ...]) -> pa.Table:
    """``counts`` without the keys that are literal reserved names (they are not text tokens)."""
    if not names or counts.num_rows == 0:
        return counts
    reserved = pa.array([n.encode() for n in names], pa.binary())
    keep = pc.invert(pc.is_in(counts.column("key").cast(pa.binary()), value_set=reserved))
    return counts.filter(keep)


def check_literal_fields(tokenizer: Any) -> None:
    """Validate a vocabulary kind's ``literal_reserved`` and ``reserved_names`` fields."""
    parse_bool("literal_reserved", tokenizer.literal_reserved)
    names = parse_str_tuple("reserved_names", tokenizer.reserved_names)
    if len(set(names)) != len(names):
        raise RecipeError("reserved_names", f"names must be distinct, got {list(names)}")
    object.__setattr__(tokenizer, "reserved_names", names)
