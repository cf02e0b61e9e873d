"""``kind = "lowercase"``: full Unicode lower-casing or case folding, with Python's semantics."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import cache
from typing import ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_str
from seqpipe.clean.base import CleanStep, as_documents, map_selected, re2_class

MODES: Final = ("lower", "casefold")
_CAPITAL_SIGMA: Final = 0x03A3  # str.lower maps it by context (final sigma); Arrow does not


def _changed_by(fn: Callable[[str], str], text: str, block: int = 1024) -> list[int]:
    """Indices ``i`` with ``fn(text[i]) != text[i]``, calling ``fn`` once per block where none does.

    ``fn`` (``str.lower`` / ``str.casefold``) maps character by character apart from the
    final-sigma rule, and never to an empty string, so ``fn(chunk) == chunk`` holds exactly
    when every character of the chunk maps to itself; only the other blocks are scanned one
    character at a time (14 of 1,086 for lower, 16 for casefold). One call per code point took 0.2-0.3 s.
    """
    out: list[int] = []
    for at in range(0, len(text), block):
        chunk = text[at : at + block]
        if fn(chunk) != chunk:
            out.extend(at + i for i, ch in enumerate(chunk) if fn(ch) != ch)
    return out


def _arrow_lower_each(text: str) -> dict[int, str]:
    """``{i: pc.utf8_lower(text[i])}`` for every ``i`` where Arrow changes ``text[i]`` taken alone.

    Arrow maps code point by code point, without context, so the whole text is lowered as
    one value (quicker and far less fresh memory than 1.1 million one-character values, see
    DEVELOPERS.md); should the result not hold one code point per input code point, the
    one-value-per-character form is used instead.
    """
    cps = np.frombuffer(text.encode("utf-32-le"), "<u4")
    out = np.frombuffer(pc.utf8_lower(pa.array([text], pa.large_string()))[0].as_py().encode("utf-32-le"), "<u4")
    if len(out) != len(cps):
        return _arrow_lower_one_by_one(text)
    changed = np.flatnonzero(out != cps)
    return {int(i): chr(c) for i, c in zip(changed.tolist(), out[changed].tolist(), strict=True)}


def _arrow_lower_one_by_one(text: str) -> dict[int, str]:
    """What :func:`_arrow_lower_each` gives, with each character lowered as a value of its own."""
    raw = np.frombuffer(text.encode("utf-8"), np.uint8)
    lead = np.flatnonzero((raw & 0xC0) != 0x80)
    one_each = pa.LargeStringArray.from_buffers(
        len(lead), pa.py_buffer(np.append(lead, len(raw)).astype(np.int64)), pa.py_buffer(raw)
    )
    each = pc.utf8_lower(one_each)
    at = np.flatnonzero(pc.not_equal(each, one_each).to_numpy(zero_copy_only=False)).tolist()
    return dict(zip(at, each.take(pa.array(at, pa.int64())).to_pylist(), strict=True))


@cache
def _unsafe_class(mode: str) -> str:
    """An RE2 class of the code points where ``pc.utf8_lower`` differs from ``str.lower`` /
    ``str.casefold`` (computed once per process, from the installed pyarrow and Python).

    Both mappings are per character apart from Python's final-sigma rule, so a document with
    none of these characters is mapped identically by Arrow.
    """
    fn = str.lower if mode == "lower" else str.casefold
    text = _all_code_points()
    arrow = _arrow_lower_each(text)
    candidates = sorted(set(arrow) | set(_changed_by(fn, text)))
    unsafe = [text[i] for i in candidates if arrow.get(i, text[i]) != fn(text[i])]
    unsafe.append(chr(_CAPITAL_SIGMA))
    return re2_class(unsafe)


def _all_code_points() -> str:
    """Every code point but the surrogates, in order."""
    cps = np.concatenate([np.arange(0, 0xD800, dtype="<u4"), np.arange(0xE000, 0x110000, dtype="<u4")])
    return cps.tobytes().decode("utf-32-le")


@dataclass(frozen=True, slots=True)
class Lowercase(CleanStep):
    """Lower-case (``str.lower``) or case-fold (``str.casefold``) every document.

    The result is always what Python's ``str`` method gives. ``pc.utf8_lower`` (C) does the
    work for documents holding none of the characters on which it disagrees with Python
    (one-to-many mappings such as U+0130, final sigma, code points of newer Unicode versions,
    and for casefold the folds such as "ß" -> "ss"); those documents get one ``str`` call each.
    """

    kind: ClassVar[str] = "lowercase"

    mode: str = "lower"

    def __post_init__(self) -> None:
        parse_str("mode", self.mode, choices=MODES)

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents lower-cased (``mode = "lower"``) or case-folded (``"casefold"``)."""
        docs = as_documents(docs)
        if not len(docs):
            return docs
        fn = str.lower if self.mode == "lower" else str.casefold
        ascii_only = pc.all(pc.string_is_ascii(docs)).as_py()
        if ascii_only:
            return pc.ascii_lower(docs)  # equals both str methods on ASCII
        unsafe = pc.match_substring_regex(docs, pattern=_unsafe_class(self.mode))
        lowered = pc.utf8_lower(docs)
        # map_selected applies fn to the original text of the flagged documents
        fixed = map_selected(docs, unsafe, fn)
        out: pa.Array = pc.if_else(unsafe, fixed, lowered)
        return out
