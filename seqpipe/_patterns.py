"""The time limit on user regular expressions (``replace`` steps, ``words`` and ``custom`` chunking).

A pattern such as ``(a+)+$`` backtracks exponentially: one 48-character line can keep a
build busy for longer than anyone waits. Each document gets ``SECONDS_PER_DOCUMENT`` per
pattern (the ``regex`` module's ``timeout`` argument, checked inside its C matcher); a
document that runs past it stops the build with a :class:`PatternTimeoutError` that names
the step, the pattern and the document, instead of a build that never ends.
"""

from __future__ import annotations

from typing import Final

from seqpipe.errors import PatternTimeoutError

SECONDS_PER_DOCUMENT: float = 10.0  # module attribute, not Final: tests lower it in a child process
_PREVIEW: Final = 40


def pattern_timeout(step: str, pattern: str, document: int, text: str) -> PatternTimeoutError:
    """The error for ``pattern`` of ``step`` running past the limit on document ``document``."""
    preview = text[:_PREVIEW] + ("..." if len(text) > _PREVIEW else "")
    return PatternTimeoutError(
        f"{step}: pattern {pattern!r} ran longer than {SECONDS_PER_DOCUMENT:g} s on document {document} "
        f"(starting {preview!r}); it backtracks too much on this text: rewrite it without nested "
        "repetition such as (a+)+",
        step=step,
        pattern=pattern,
        document=document,
    )
