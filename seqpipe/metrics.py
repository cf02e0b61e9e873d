"""Figures of an evaluation pass that compare across tokenizers.

A model's loss over an evaluation pass, summed in nats (natural-log units) over the scored
tokens, is turned into:

* bits per token: ``loss / ln 2 / tokens``;
* perplexity: ``exp(loss / tokens)``, so ``log2(perplexity) = bits per token``;
* bits per byte: ``loss / ln 2 / bytes``, with ``bytes`` the UTF-8 bytes of the evaluated text;
* bits per character: the same over Unicode code points.

Perplexity and bits per token depend on how the text was cut into tokens: a tokenizer with
longer tokens has fewer, harder predictions. Bits per byte and per character divide the same
total by a count that does not depend on the tokenizer, so two tokenizations of one text can
be compared (``bits per byte = bits per token * tokens / bytes``). The caller decides which
text the byte count covers; the corpus report counts the cleaned document text as stored
before tokenization, and markers (an end token that is scored) add loss but no bytes.

No numpy here: these are scalar figures, and a training loop can call them on a float.
"""

from __future__ import annotations

import math
import operator
import sys
from dataclasses import dataclass
from typing import Any

from seqpipe.errors import RecipeError

# Bad arguments raise RecipeError naming the argument, as the report's options do (exit code 2, usage).


def _check_loss(loss: float) -> float:
    try:
        value = float(loss)
    except (TypeError, ValueError) as exc:
        raise RecipeError("loss", f"expected a summed loss in nats, got {loss!r}") from exc
    if not math.isfinite(value) or value < 0:
        raise RecipeError("loss", f"expected a finite number >= 0 (summed loss in nats), got {loss!r}")
    return value


def _check_count(name: str, count: int) -> int:
    try:
        value = operator.index(count)  # int and numpy integers; not floats
    except TypeError:
        value = 0
    if isinstance(count, bool) or value <= 0:
        raise RecipeError(name, f"expected a positive integer, got {count!r}")
    return value


def bits(loss: float) -> float:
    """A summed natural-log loss in bits (base-2 logarithm units)."""
    return _check_loss(loss) / math.log(2)


def bits_per_token(loss: float, tokens: int) -> float:
    """Mean loss per scored token, in bits."""
    return bits(loss) / _check_count("tokens", tokens)


def bits_per_byte(loss: float, text_bytes: int) -> float:
    """Total loss in bits divided by the UTF-8 bytes of the evaluated text."""
    return bits(loss) / _check_count("text_bytes", text_bytes)


def bits_per_character(loss: float, characters: int) -> float:
    """Total loss in bits divided by the Unicode code points of the evaluated text."""
    return bits(loss) / _check_count("characters", characters)


def perplexity(loss: float, tokens: int) -> float:
    """``exp`` of the mean natural-log loss per scored token (``inf`` past the float range:
    bits per token stays finite there)."""
    mean = _check_loss(loss) / _check_count("tokens", tokens)
    return math.exp(mean) if mean < math.log(sys.float_info.max) else math.inf


@dataclass(frozen=True, slots=True)
class LossFigures:
    """Every figure of one evaluation pass (see :func:`loss_figures`)."""

    loss: float  # summed natural-log loss, nats
    tokens: int
    text_bytes: int | None
    characters: int | None
    bits_per_token: float
    perplexity: float
    bits_per_byte: float | None
    bits_per_character: float | None

    def as_dict(self) -> dict[str, Any]:
        return {
            "loss_nats": self.loss,
            "tokens": self.tokens,
            "text_bytes": self.text_bytes,
            "characters": self.characters,
            "bits_per_token": self.bits_per_token,
            "perplexity": self.perplexity,
            "bits_per_byte": self.bits_per_byte,
            "bits_per_character": self.bits_per_character,
        }


def loss_figures(
    loss: float, *, tokens: int, text_bytes: int | None = None, characters: int | None = None
) -> LossFigures:
    """Bits per token, perplexity and (when the counts are given) bits per byte and per
    character of an evaluation pass whose loss, summed over ``tokens`` scored tokens, is
    ``loss`` nats; ``text_bytes`` and ``characters`` measure the evaluated text."""
    return LossFigures(
        loss=_check_loss(loss),
        tokens=_check_count("tokens", tokens),
        text_bytes=None if text_bytes is None else _check_count("text_bytes", text_bytes),
        characters=None if characters is None else _check_count("characters", characters),
        bits_per_token=bits_per_token(loss, tokens),
        perplexity=perplexity(loss, tokens),
        bits_per_byte=None if text_bytes is None else bits_per_byte(loss, text_bytes),
        bits_per_character=None if characters is None else bits_per_character(loss, characters),
    )
