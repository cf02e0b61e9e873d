"""Cleaning steps: the recipe's ``[[clean]]`` entries, one step per module.

``parse_step(table, path)`` builds the step named by ``table["kind"]``; steps run
in recipe order on ``large_string`` arrays (see :mod:`seqpipe.clean.base`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Final

import pyarrow as pa

from seqpipe._parse import parse_kind
from seqpipe.clean.base import CleanStep
from seqpipe.clean.collapse_whitespace import CollapseWhitespace
from seqpipe.clean.dedupe import Dedupe
from seqpipe.clean.function_words import FunctionWords
from seqpipe.clean.letter_share import LetterShare
from seqpipe.clean.longest_line import LongestLine
from seqpipe.clean.lowercase import Lowercase
from seqpipe.clean.min_length import MinLength
from seqpipe.clean.near_dedupe import NearDedupe
from seqpipe.clean.normalize import Normalize
from seqpipe.clean.redact import Redact
from seqpipe.clean.repeated_lines import RepeatedLines
from seqpipe.clean.repeated_ngrams import RepeatedNgrams
from seqpipe.clean.replace import Replace
from seqpipe.clean.strip_control import StripControl
from seqpipe.clean.word_length import WordLength

STEP_KINDS: Final[dict[str, type[CleanStep]]] = {
    cls.kind: cls
    for cls in (
        Normalize,
        Lowercase,
        Replace,
        StripControl,
        CollapseWhitespace,
        MinLength,
        Dedupe,
        Redact,
        LetterShare,
        RepeatedLines,
        RepeatedNgrams,
        WordLength,
        LongestLine,
        FunctionWords,
        NearDedupe,
    )
}


def parse_step(table: Any, path: str) -> CleanStep:
    """The cleaning step described by recipe table ``table`` found at key path ``path``."""
    return parse_kind(STEP_KINDS, table, path, "cleaning step")


def apply_steps(steps: Sequence[CleanStep], docs: pa.Array) -> pa.Array:
    """``docs`` through every step in order (``dedupe`` passes them on unchanged)."""
    for step in steps:
        docs = step.apply(docs)
    return docs


def clean_text(steps: Sequence[CleanStep], text: str) -> str:
    """``text`` through the steps that rewrite text, as a build cleans a document; filters
    (steps with ``keep``) and ``dedupe`` judge whole documents of a corpus and are skipped."""
    docs = pa.array([text], pa.large_string())
    for step in steps:
        if not step.is_dedupe and not hasattr(step, "keep"):
            docs = step.apply(docs)
    return str(docs[0].as_py())


__all__ = [
    "STEP_KINDS",
    "CleanStep",
    "CollapseWhitespace",
    "Dedupe",
    "FunctionWords",
    "LetterShare",
    "LongestLine",
    "Lowercase",
    "MinLength",
    "NearDedupe",
    "Normalize",
    "Redact",
    "RepeatedLines",
    "RepeatedNgrams",
    "Replace",
    "StripControl",
    "WordLength",
    "apply_steps",
    "clean_text",
    "parse_step",
]
