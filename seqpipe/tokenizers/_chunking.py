r"""How the byte-pair tokenizer cuts text into chunks before it merges: named presets.

Merges never cross a chunk edge, so the chunking decides which strings can ever become one
token. A recipe names a preset (``chunking = "trailing-space"``); ``chunking = "custom"`` with
``chunk_regex`` takes a pattern of the user's own. Every preset covers the text: its chunks
concatenate back to the document.

The default preset, ``trailing-space``, and why each choice:

* A word is a letter followed by letters and combining marks (``\p{L}[\p{L}\p{M}]*``), so a
  mark written as its own code point (``e`` + U+0301) never leaves its letter. An apostrophe
  (``'`` or U+2019) between two letters stays in the word (``harbourmaster's``, ``she'd``):
  possessives and elisions stay whole without a list of any one language's suffixes.
* What is written after a word up to the next word goes with it: first the closing
  punctuation set against it (closing brackets and quotes, and the other marks of Unicode
  class Po: ``. , ; : ! ? ' "`` and the like), then the spaces and tabs (``"lamp, "``,
  ``"lit. "``, ``"(tides) "``). Running text writes these against the word before and a
  space after them, so a word and its tail make one unit to learn, and no chunk starts with
  a space: only spaces at the start of a line (indentation) form chunks of their own.
* Digits are grouped in threes from the right, as thousands are written (``12345`` ->
  ``12`` ``345``), so a group means the same place values wherever it occurs and the
  vocabulary does not fill with one token per frequent year or count. A number takes its
  tail like a word (``"40% "``).
* Any other run of punctuation and symbols (opening brackets and quotes, dashes, ``$``,
  ``+``) is one chunk with the spaces after it (``"-- "``, ``"("``).
* Line breaks stand alone: a run of them (``\n``, ``\r``, ``\v``, ``\f``, U+0085, U+2028,
  U+2029) is its own chunk, never joined to the text or the spaces beside it.

Leading spaces compress space-separated text a little better at small vocabularies (a word
keeps one spelling whether or not punctuation follows it); with the word's tail in its chunk
the default catches up as the vocabulary grows. ``scripts/bench`` measures both
(``bpe.chunking_compression_vs_previous``).

The other presets change one thing: ``trailing-space-digitwise`` makes every digit its own
chunk (for text about arithmetic, where a number's tokens should line up with its digits);
``space-separated`` cuts only at whitespace (a run of non-space characters with the spaces
after it), for text where letters, digits and symbols form one name (codes, identifiers).
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache
from types import MappingProxyType
from typing import Any, Final

import regex

_BREAK: Final = r"[\n\v\f\r\x85\u2028\u2029]"
_SPACE: Final = r"[^\S\n\v\f\r\x85\u2028\u2029]"  # whitespace that does not break the line
_WORD: Final = r"\p{L}[\p{L}\p{M}]*(?:['\u2019]\p{L}[\p{L}\p{M}]*)*"
# The first group of a digit run takes 1-3 digits so that whole threes are left after it; the
# lookahead reads the rest of the run, so it is tried only where a run starts. Inside a run (a digit
# before, which only a digit group can end with) the rest is already whole threes: take three. Using
# the lookahead at every group read a run of n digits about n*n/3 times (40,000 digits: seconds).
_DIGIT_GROUP: Final = r"(?<=\p{N})\p{N}{3}|\p{N}{1,3}(?=(?:\p{N}{3})*(?!\p{N}))"
_TAIL: Final = r"[\p{Pe}\p{Pf}\p{Po}]*"  # closing brackets and quotes, and . , ; : ! ? ' " and the like
_OTHER: Final = r"[^\s\p{L}\p{N}]+"  # punctuation, symbols, marks with no letter before them
# the single-character classes above, for the batch chunker (_fast_chunking) to class characters by
BREAK_CLASS: Final = _BREAK
SPACE_CLASS: Final = _SPACE
TAIL_CLASS: Final = _TAIL.removesuffix("*")


def _trailing(*heads: str) -> str:
    """Words or numbers (``heads``) with their tail; other punctuation runs with their spaces;
    line-break runs; spaces that start a line."""
    return f"(?:{'|'.join(heads)}){_TAIL}{_SPACE}*|{_OTHER}{_SPACE}*|{_BREAK}+|{_SPACE}+"


PRESETS: Final[Mapping[str, str]] = MappingProxyType(
    {
        "trailing-space": _trailing(_WORD, _DIGIT_GROUP),
        "trailing-space-digitwise": _trailing(_WORD, r"\p{N}"),
        "space-separated": rf"[^\s]+{_SPACE}*|{_BREAK}+|{_SPACE}+",
    }
)
DEFAULT: Final = "trailing-space"
CUSTOM: Final = "custom"  # chunking = "custom" takes the pattern from chunk_regex
CHOICES: Final = (*PRESETS, CUSTOM)


def pattern_of(chunking: str, chunk_regex: str) -> str:
    """The regular expression a tokenizer's ``chunking`` (and ``chunk_regex``) stand for."""
    return chunk_regex if chunking == CUSTOM else PRESETS[chunking]


# The presets run without the per-document time limit (seqpipe/_patterns.py): the regex module
# checks the clock as it matches, which made chunking about 2.5 times slower on running text. Each
# preset is ours and reads every character a bounded number of times, except the default's digit
# rule: deciding where a run's first group ends reads the whole run, and the regex module does that
# in time that grows faster than the run (800,000 digits: seconds). A document with a digit run
# longer than this keeps the limit; a run of digits longer than a line of text is not prose.
_LONG_DIGIT_RUN: Final = regex.compile(r"(?<!\p{N})\p{N}{1000}")


def needs_time_limit(chunking: str, text: str) -> bool:
    """Whether chunking ``text`` with ``chunking`` must run under the pattern time limit: always
    for ``custom`` patterns, for a preset only where it is not known to run in linear time."""
    return chunking == CUSTOM or _LONG_DIGIT_RUN.search(text) is not None


@lru_cache(maxsize=16)
def chunker(pattern: str) -> Any:
    """``pattern`` compiled with a one-character fallback, so the chunks always cover the text
    (and byte-base decoding stays exact) even where the pattern skips a character."""
    return regex.compile(f"(?:{pattern})|(?s:.)")
