"""``kind = "function_words"``: drop documents with too few common function words of a language."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_int, parse_str
from seqpipe.clean._quality import QualityFilter, scratch
from seqpipe.clean._word_table import LOW_BYTES, WordTable, pack_ascii, word_table

# The English list is the one of Rae et al. 2021, "Scaling Language Models: Methods, Analysis &
# Insights from Training Gopher", appendix A (from memory). Other languages need a list chosen
# with the same care; none is offered rather than a guessed one.
FUNCTION_WORDS: Final[dict[str, tuple[str, ...]]] = {
    "en": ("the", "be", "to", "of", "and", "that", "have", "with"),
}
_TRIMMED: Final = "\"'()[]{}.,;:!?-\u2018\u2019\u201c\u201d"  # stripped from both ends of a word
# per byte value: an ASCII character of _TRIMMED
_ASCII_TRIMMED: Final = np.isin(np.arange(256), [ord(c) for c in _TRIMMED if c.isascii()])
_HIGH_BITS: Final = np.uint64(0x0080_8080_8080_8080)
_PLUS_3F: Final = np.uint64(0x003F_3F3F_3F3F_3F3F)  # per byte b < 0x80: b + 0x3F has its high bit iff b >= "A"
_CASE_BITS: Final = np.uint64(0x0020_2020_2020_2020)  # the case bit of each of the seven low bytes
_PLUS_25: Final = np.uint64(0x0025_2525_2525_2525)  # per byte b < 0x80: b + 0x25 has its high bit iff b > "Z"


def _ascii_lower(codes: np.ndarray) -> np.ndarray:
    """Packed codes of words of ASCII bytes with every byte A-Z made a-z (bytewise, no carry
    crosses a byte since every byte is below 0x80)."""
    with np.errstate(over="ignore"):
        upper = (codes + _PLUS_3F) & ~(codes + _PLUS_25) & _HIGH_BITS
    out: np.ndarray = codes | (upper >> np.uint64(2))  # 0x80 >> 2 is the 0x20 between the cases
    return out


def _trimmed_packed(codes: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Packed codes of ASCII words of one to seven bytes with the ASCII characters of
    ``_TRIMMED`` stripped from both ends (the code of an emptied word is 0, no word's code)."""
    data, size = codes & LOW_BYTES[7], sizes.copy()
    at = np.arange(len(codes))  # the words that may still end in such a character
    while len(at):
        last = (data[at] >> (np.uint64(8) * (size[at] - 1).astype(np.uint64))) & np.uint64(0xFF)
        at = at[np.take(_ASCII_TRIMMED, last.astype(np.intp))]
        size[at] -= 1
        data[at] &= LOW_BYTES[size[at]]
        at = at[size[at] > 0]
    at = np.flatnonzero(size > 0)  # then from the start
    while len(at):
        at = at[np.take(_ASCII_TRIMMED, (data[at] & np.uint64(0xFF)).astype(np.intp))]
        size[at] -= 1
        data[at] >>= np.uint64(8)
        at = at[size[at] > 0]
    out: np.ndarray = np.where(size > 0, data | (size.astype(np.uint64) << np.uint64(56)), np.uint64(0))
    return out


def _lower_not_ascii(chars: pa.Array) -> pa.Array:
    """Per one-character string: whether it is no character of ``_TRIMMED`` and lower-cases to
    something beyond ASCII."""
    trimmed = pc.is_in(chars, value_set=pa.array(list(_TRIMMED), pa.large_string()))
    return pc.and_(pc.invert(trimmed), pc.invert(pc.string_is_ascii(pc.utf8_lower(chars))))


def _sure_flags(table: WordTable, language: str) -> np.ndarray:
    """Per word: True when it is, lower-cased, one of the language's ASCII function words of one
    to seven bytes with nothing to strip. Such a word is counted by :func:`_function_word_flags`
    too (a subset of its flags): a code equal to a lower-cased function word's is a short ASCII
    word (``_ascii_lower`` leaves a byte's high bit and the code's top byte as they are, and
    longer words' keys have the top byte 0xFF), and a word of letters has nothing to strip."""
    listed = [w for w in FUNCTION_WORDS[language] if w.isascii() and len(w) <= 7]
    if not all(w.isalpha() and w.islower() for w in listed):
        out: np.ndarray = np.isin(_ascii_lower(table.keys), pack_ascii(listed))
        return out
    # lower-case letters only: a byte b matches such a letter c exactly when b | 0x20 == c (c or
    # its upper case; no other byte), and the bytes past a packed word are 0 in both codes, so
    # one OR of 0x20 into the seven low bytes of both sides stands for _ascii_lower
    # np.isin's own way with a few values (a compare per value), through scratch arrays
    folded = scratch("function_words.folded", len(table.keys), np.uint64)
    np.bitwise_or(table.keys, _CASE_BITS, out=folded)
    hit = scratch("function_words.hit", len(table.keys), np.bool_)
    out = np.zeros(len(table.keys), dtype=bool)
    for code in (pack_ascii(listed) | _CASE_BITS).tolist():
        out |= np.equal(folded, np.uint64(code), out=hit)
    return out


def _function_word_flags(table: WordTable, language: str, which: np.ndarray | None = None) -> np.ndarray:
    """Per word of ``which`` (indices; all words when None): 1 when, lower-cased with ``_TRIMMED``
    stripped from both ends, it is one of the language's function words. An ASCII word of one
    to seven bytes is judged on its packed code (stripping ASCII characters and lower-casing
    ASCII are bytewise there). Pyarrow compute judges, once per distinct word, the other words
    that may be one: those beyond ASCII unless one of their characters stays beyond ASCII (with
    ASCII function words), and the longer ASCII words that stripping can shorten (all longer
    ones, if a function word is that long). The rest cannot shrink to a function word's length
    or to ASCII."""
    words = FUNCTION_WORDS[language]
    chosen = np.arange(len(table.keys), dtype=np.int64) if which is None else which
    if not len(chosen):
        return np.zeros(0, dtype=np.int64)
    starts, ends = table.starts[chosen], table.ends[chosen]
    codes, sizes = table.keys[chosen], ends - starts  # exact for the short words judged on them
    ascii_words = table.chars[chosen] == sizes
    # np.take: faster than fancy indexing (DEVELOPERS.md)
    edge = np.take(_ASCII_TRIMMED, np.take(table.data, starts))
    edge |= np.take(_ASCII_TRIMMED, np.take(table.data, ends - 1))
    wanted = pack_ascii([w for w in words if w.isascii() and len(w) <= 7])
    short = ascii_words & (sizes <= 7)
    # every code lower-cased as if it were a short ASCII word; kept for those with nothing to strip
    flags: np.ndarray = (np.isin(_ascii_lower(codes), wanted) & short & ~edge).astype(np.int64)
    stripped = np.flatnonzero(short & edge)
    flags[stripped] = np.isin(_ascii_lower(_trimmed_packed(codes[stripped], sizes[stripped])), wanted)
    maybe = ~ascii_words
    if all(w.isascii() for w in words):
        maybe &= ~table.holding_wide(_lower_not_ascii)[chosen]
    long_word = any(len(w.encode("utf-8")) > 7 for w in words)
    rest = np.flatnonzero(maybe | (ascii_words & (sizes > 7) & (edge | long_word)))
    if len(rest):
        distinct, index = table.distinct(chosen[rest])  # each distinct word is judged once
        bare = pc.utf8_trim(pc.utf8_lower(distinct), characters=_TRIMMED)
        hit = pc.is_in(bare, value_set=pa.array(words, pa.large_string()))
        flags[rest] = np.asarray(hit.to_numpy(zero_copy_only=False), dtype=np.int64)[index]
    return flags


def _words_of(first: np.ndarray, docs: np.ndarray) -> np.ndarray:
    """The indices of the words of the documents ``docs`` (increasing), in order: each
    document's run ``first[d]:first[d + 1]``, built from the runs alone (no pass over every word
    of the batch; a few documents are asked for)."""
    begin, end = first[docs], first[docs + 1]
    sizes = end - begin
    # per word its index within the runs laid end to end, moved to its run's start
    start_in_runs = np.zeros(len(docs), dtype=np.int64)
    np.cumsum(sizes[:-1], out=start_in_runs[1:])
    out: np.ndarray = np.repeat(begin - start_in_runs, sizes) + np.arange(int(sizes.sum()), dtype=np.int64)
    return out


@dataclass(frozen=True, slots=True)
class FunctionWords(QualityFilter):
    """Keep documents holding at least ``minimum`` occurrences of the ``language``'s function
    words (whole whitespace-separated words, compared case-insensitively, with leading and
    trailing punctuation removed).

    Running prose of a language uses its function words all the time; word lists, tables,
    code and text in another language do not. Default 2 follows Rae et al. 2021 (Gopher),
    appendix A (from memory).
    """

    kind: ClassVar[str] = "function_words"

    language: str = "en"
    minimum: int = 2

    def __post_init__(self) -> None:
        parse_str("language", self.language, choices=tuple(FUNCTION_WORDS))
        parse_int("minimum", self.minimum, minimum=1)

    def measure(self, docs: pa.Array) -> np.ndarray:
        """Per document: occurrences of the language's function words."""
        table = word_table(docs)
        return table.per_document(_function_word_flags(table, self.language))

    def keep(self, docs: pa.Array) -> np.ndarray:
        """Boolean mask: True for each document ``apply`` keeps (``measure >= minimum``). The
        short ASCII function words needing no stripping (:func:`_sure_flags`, a few whole-array
        operations) already reach ``minimum`` in most prose; the full count is taken only for
        the words of the documents where they do not."""
        table = word_table(docs)
        count = table.per_document(_sure_flags(table, self.language))
        unsure = count < self.minimum
        if unsure.any():
            which = _words_of(table.first, np.flatnonzero(unsure))
            hits = which[_function_word_flags(table, self.language, which) > 0]
            count[unsure] = np.bincount(table.doc[hits], minlength=len(count))[unsure]
        return np.asarray(count >= self.minimum, dtype=bool)
