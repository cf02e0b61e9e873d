"""Word tokenizer: runs of letters/marks/digits/underscore, or single other characters.

The default pattern is ours: ``[\\p{L}\\p{M}\\p{N}_]+`` (a word or number) or one character
that is neither such a character nor whitespace (punctuation, symbols, emoji code points).
Whitespace is Unicode whitespace as Python's ``str.isspace`` sees it (the ``\\p{Z}`` categories
plus the ASCII/C1 separators), spelled out so RE2 and ``regex`` agree on it.

For the default pattern, segmentation runs in numpy over the batch's UTF-8 bytes (see
``_segment_default``). A custom ``pattern`` falls back to ``regex.findall`` per document; for the
default pattern both paths give identical tokens (tested).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar, Final

import numpy as np
import pyarrow as pa
import regex

from seqpipe import _patterns
from seqpipe._parse import parse_str
from seqpipe.errors import RecipeError
from seqpipe.tokenizers._common import (
    DEFAULT_RESERVED,
    as_string_array,
    check_literal_fields,
    drop_reserved_counts,
    gather,
    segment_with_reserved,
    segments_from_tokens,
    stored_vocabulary,
)
from seqpipe.tokenizers.base import Encoder, Segments, Tokenizer, VocabEncoder
from seqpipe.vocab import VocabSpec, build_vocabulary

_WORD: Final = r"\p{L}\p{M}\p{N}_"
# exactly the 29 code points for which str.isspace() is true (and Arrow's utf8 whitespace)
_WS_PY: Final = r"\t\n\x0b\x0c\r\x1c-\x1f \x85\xa0\u1680\u2000-\u200a\u2028\u2029\u202f\u205f\u3000"
DEFAULT_PATTERN: Final = rf"[{_WORD}]+|[^{_WORD}{_WS_PY}]"

_SPACE, _WORDCH, _OTHER = 0, 1, 2
_IS_WORD = regex.compile(rf"[{_WORD}]")
_IS_SPACE = regex.compile(rf"[{_WS_PY}]")


def _classify(cp: int) -> int:
    ch = chr(cp)
    if _IS_SPACE.match(ch):
        return _SPACE
    return _WORDCH if _IS_WORD.match(ch) else _OTHER


# class by byte value; bytes >= 0x80 are provisional and overwritten per code point
_ASCII_CLASS: Final = np.array([_classify(c) if c < 128 else _OTHER for c in range(256)], dtype=np.uint8)
_CLASS_CACHE: dict[int, int] = {}


def _decode_code_points(data: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Code point values of the multi-byte UTF-8 sequences starting at ``pos``."""
    padded = np.concatenate([data, np.zeros(3, np.uint8)])
    b0 = padded[pos].astype(np.uint32)
    b1 = (padded[pos + 1] & 0x3F).astype(np.uint32)
    b2 = (padded[pos + 2] & 0x3F).astype(np.uint32)
    b3 = (padded[pos + 3] & 0x3F).astype(np.uint32)
    two = ((b0 & 0x1F) << 6) | b1
    three = ((b0 & 0x0F) << 12) | (b1 << 6) | b2
    four = ((b0 & 0x07) << 18) | (b1 << 12) | (b2 << 6) | b3
    out: np.ndarray = np.where(b0 < 0xE0, two, np.where(b0 < 0xF0, three, four))
    return out


_Classes = tuple[np.ndarray, np.ndarray, np.ndarray]
_LAST: list[tuple[pa.Array, _Classes | None]] = []  # one entry: (batch, its classes)


def _byte_classes(texts: pa.Array) -> _Classes | None:
    """The batch's UTF-8 bytes, document byte offsets, and each byte's code-point class
    (space, word, other); None for a batch without text.

    ASCII bytes are classed by table; every other code point through the same ``regex``
    classes as DEFAULT_PATTERN, once per distinct code point, then spread over its bytes.
    The last batch's result is kept (keyed by the array object itself, which the entry holds
    alive), because a build asks for words and tokens of the same batch.
    """
    if _LAST and _LAST[0][0] is texts:
        return _LAST[0][1]
    result = _compute_classes(texts)
    _LAST[:] = [(texts, result)]
    return result


def _seed_classes(texts: pa.Array, fragments: pa.Array, kept: np.ndarray) -> None:
    """Take the classes of ``fragments`` (the byte ranges ``kept`` of ``texts``) from those of
    ``texts`` when they are the last batch's: a code point's class depends on it alone."""
    if not _LAST or _LAST[0][0] is not texts or _LAST[0][1] is None:
        return
    bounds = np.frombuffer(fragments.buffers()[1], dtype=np.int64)[: len(fragments) + 1]  # from 0
    if not bounds[-1]:
        _LAST[:] = [(fragments, None)]
        return
    data = np.frombuffer(fragments.buffers()[2], dtype=np.uint8)[: bounds[-1]]
    _LAST[:] = [(fragments, (data, bounds, gather(_LAST[0][1][2], kept)))]


def _compute_classes(texts: pa.Array) -> _Classes | None:
    n_docs = len(texts)
    offsets = np.frombuffer(texts.buffers()[1], dtype=np.int64)[texts.offset : texts.offset + n_docs + 1]
    buf = texts.buffers()[2]
    if buf is None or n_docs == 0 or offsets[-1] == offsets[0]:
        return None
    data = np.frombuffer(buf, dtype=np.uint8)[offsets[0] : offsets[-1]]
    doc_bytes = offsets - offsets[0]
    cls = np.take(_ASCII_CLASS, data)  # np.take, not fancy indexing: faster on batches (DEVELOPERS.md)
    high = np.flatnonzero(data >= 0xC0)  # first bytes of multi-byte sequences
    if len(high):
        cps = _decode_code_points(data, high)
        uniq, inverse = np.unique(cps, return_inverse=True)
        ucls = np.fromiter(
            (_CLASS_CACHE.setdefault(int(c), _classify(int(c))) for c in uniq), dtype=np.uint8, count=len(uniq)
        )
        c = ucls[inverse]
        first = data[high]
        cls[high] = c
        cls[high + 1] = c
        three = first >= 0xE0
        cls[high[three] + 2] = c[three]
        four = first >= 0xF0
        cls[high[four] + 3] = c[four]
    return data, doc_bytes, cls


def count_words(texts: pa.Array) -> np.ndarray:
    """Whitespace-separated words per document (as ``len(str.split())`` counts them), in numpy."""
    classes = _byte_classes(texts)
    if classes is None:
        return np.zeros(len(texts), np.int64)
    _, doc_bytes, cls = classes
    keep = cls != _SPACE
    starts = keep.copy()
    starts[1:] &= ~keep[:-1]
    inside = doc_bytes[:-1][doc_bytes[:-1] < len(keep)]
    starts[inside] = keep[inside]  # a word never runs across a document boundary
    return np.diff(np.searchsorted(np.flatnonzero(starts), doc_bytes)).astype(np.int64)


def _segment_default(texts: pa.Array) -> tuple[pa.Array, np.ndarray]:
    """Default-pattern segmentation with numpy over the UTF-8 bytes of the whole batch.

    Token starts are marked on the byte classes (:func:`_byte_classes`), whitespace bytes
    squeezed out, and Arrow gets the squeezed buffer with the token offsets: one byte-sized
    array per step and no Python object per token.
    """
    classes = _byte_classes(texts)
    if classes is None:
        return pa.array([], pa.large_string()), np.zeros(len(texts), np.int64)
    data, doc_bytes, cls = classes
    is_lead = (data & 0xC0) != 0x80
    is_word = cls == _WORDCH
    keep = cls != _SPACE
    prev_word = np.empty_like(is_word)
    prev_word[0] = False
    prev_word[1:] = is_word[:-1]
    nonempty = doc_bytes[:-1][doc_bytes[:-1] < len(data)]
    prev_word[nonempty] = False  # a token never runs across a document boundary
    starts_tok = is_lead & ((cls == _OTHER) | (is_word & ~prev_word))
    # np.compress, not boolean indexing: faster on these byte arrays (DEVELOPERS.md)
    squeezed = np.compress(keep, data)
    tok_offsets = np.flatnonzero(np.compress(keep, starts_tok))
    tok_offsets = np.append(tok_offsets, len(squeezed))
    flat = pa.LargeStringArray.from_buffers(len(tok_offsets) - 1, pa.py_buffer(tok_offsets), pa.py_buffer(squeezed))
    # tokens per document: token starts between document byte offsets
    tok_pos = np.flatnonzero(starts_tok)
    return flat, np.diff(np.searchsorted(tok_pos, doc_bytes)).astype(np.int64)


def _find_all(compiled: Any, texts: list[str], pattern: str) -> list[list[str]]:
    """Every document's matches, each document under the pattern time limit."""
    limit = _patterns.SECONDS_PER_DOCUMENT
    found = []
    for d, text in enumerate(texts):
        try:
            found.append(compiled.findall(text, timeout=limit))
        except TimeoutError:
            raise _patterns.pattern_timeout("tokenizer words", pattern, d, text) from None
    return found


@dataclass(frozen=True, slots=True)
class WordTokenizer(Tokenizer):
    """Words by a regex pattern; decode joins tokens with ``separator``."""

    kind: ClassVar[str] = "words"
    pattern: str = DEFAULT_PATTERN
    separator: str = " "
    # with literal_reserved, the names in reserved_names (synced from [vocabulary] reserved by the
    # recipe) are cut out of the text and encode as their reserved ids, e.g. redaction placeholders
    literal_reserved: bool = False
    reserved_names: tuple[str, ...] = DEFAULT_RESERVED

    def __post_init__(self) -> None:
        parse_str("pattern", self.pattern)
        parse_str("separator", self.separator, allow_empty=True)
        try:
            regex.compile(self.pattern)
        except regex.error as exc:
            raise RecipeError("pattern", f"not a valid regular expression ({exc}): {self.pattern!r}") from None
        check_literal_fields(self)

    def segment(self, texts: Sequence[str] | pa.Array) -> Segments:
        arr = as_string_array(texts)
        if self.literal_reserved:
            return segment_with_reserved(self._segment, arr, self.reserved_names, _seed_classes)
        return self._segment(arr)

    def _segment(self, arr: pa.Array) -> Segments:
        if self.pattern == DEFAULT_PATTERN:
            flat, lengths = _segment_default(arr)
            return segments_from_tokens(flat, lengths)
        found = _find_all(regex.compile(self.pattern), arr.to_pylist(), self.pattern)
        lengths = np.fromiter((len(f) for f in found), dtype=np.int64, count=len(found))
        flat_list = [tok for toks in found for tok in toks]
        return segments_from_tokens(pa.array(flat_list, pa.large_string()), lengths)

    def fit(self, counts: pa.Table, spec: VocabSpec, *, show: bool = False) -> Encoder:
        return WordEncoder(self, build_vocabulary(self._counts(counts), spec))

    def _counts(self, counts: pa.Table) -> pa.Table:
        return drop_reserved_counts(counts, self.reserved_names) if self.literal_reserved else counts

    def load(self, directory: Path) -> Encoder:
        return WordEncoder(self, stored_vocabulary(directory))


class WordEncoder(VocabEncoder):
    """Words decode joined by the tokenizer's separator (not lossless: spacing is lost)."""

    tokenizer: WordTokenizer

    def join(self, tokens: list[bytes]) -> str:
        return self.tokenizer.separator.join(t.decode("utf-8", errors="replace") for t in tokens)
