"""Evaluation figures (seqpipe.metrics): bits per token, per byte, per character and perplexity
from a summed natural-log loss."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import seqpipe
from seqpipe.errors import RecipeError
from seqpipe.metrics import bits_per_byte, bits_per_character, bits_per_token, loss_figures, perplexity


def test_worked_example_by_hand() -> None:
    """Four tokens predicted with probabilities 1/2, 1/4, 1/8, 1/8 over the 5-byte, 4-character text
    "ñaba" (ñ is 2 UTF-8 bytes): the negative log2-likelihood is 1 + 2 + 3 + 3 = 9 bits, so
    9/4 bits per token, perplexity 2**(9/4), 9/5 bits per byte and 9/4 bits per character."""
    text = "ñaba"
    probs = [1 / 2, 1 / 4, 1 / 8, 1 / 8]
    loss = -sum(math.log(p) for p in probs)  # nats, as a training loop sums them
    fig = loss_figures(loss, tokens=4, text_bytes=len(text.encode("utf-8")), characters=len(text))
    assert (fig.text_bytes, fig.characters) == (5, 4)
    assert fig.bits_per_token == pytest.approx(9 / 4)
    assert fig.perplexity == pytest.approx(2 ** (9 / 4))
    assert fig.bits_per_byte == pytest.approx(9 / 5)
    assert fig.bits_per_character == pytest.approx(9 / 4)
    assert fig.as_dict()["bits_per_byte"] == fig.bits_per_byte


@settings(max_examples=100, deadline=None)
@given(st.floats(0.01, 50.0), st.integers(1, 10**9), st.integers(1, 10**9))
def test_bits_per_byte_is_log2_perplexity_times_tokens_over_bytes(mean: float, tokens: int, n_bytes: int) -> None:
    """Common practice: bits per byte = log2(perplexity) * tokens / bytes, and log2(perplexity)
    is bits per token (mean losses from 0.01 to 50 nats per token: below, log2 of a perplexity
    near 1 loses the digits the identity compares)."""
    loss = mean * tokens
    ppl = perplexity(loss, tokens)
    assert bits_per_token(loss, tokens) == pytest.approx(math.log2(ppl), rel=1e-9, abs=1e-12)
    assert bits_per_byte(loss, n_bytes) == pytest.approx(math.log2(ppl) * tokens / n_bytes, rel=1e-9, abs=1e-12)


def test_numpy_counts_and_losses_are_accepted() -> None:
    """A numpy float loss and numpy integer counts (what a vectorized pass produces) work."""
    fig = loss_figures(np.float64(np.log(2) * 8), tokens=np.int64(4), text_bytes=np.int64(2), characters=np.int32(2))
    assert (fig.bits_per_token, fig.bits_per_byte, fig.bits_per_character) == pytest.approx((2.0, 4.0, 4.0))


def test_perplexity_past_the_float_range_is_infinite() -> None:
    """A mean loss whose exp overflows gives perplexity inf, while bits per token stay finite."""
    fig = loss_figures(800.0, tokens=1, text_bytes=2)
    assert math.isinf(fig.perplexity)
    assert fig.bits_per_token == pytest.approx(800 / math.log(2))
    assert fig.bits_per_byte == pytest.approx(400 / math.log(2))


def test_counts_are_optional() -> None:
    """Without byte or character counts those figures are None; the others are still given."""
    fig = loss_figures(math.log(3) * 2, tokens=2)
    assert fig.perplexity == pytest.approx(3.0)
    assert fig.bits_per_byte is None and fig.bits_per_character is None


@pytest.mark.parametrize(
    ("call", "key"),
    [
        (lambda: bits_per_byte(-1.0, 3), "loss"),
        (lambda: bits_per_byte(float("nan"), 3), "loss"),
        (lambda: bits_per_byte(1.0, 0), "text_bytes"),
        (lambda: bits_per_character(1.0, 2.5), "characters"),  # type: ignore[arg-type]
        (lambda: perplexity(1.0, True), "tokens"),
        (lambda: loss_figures(1.0, tokens=3, characters=-2), "characters"),
    ],
)
def test_bad_arguments_name_themselves(call: object, key: str) -> None:
    """A negative or non-finite loss, or a count that is not a positive integer, raises
    RecipeError naming the argument."""
    with pytest.raises(RecipeError) as info:
        call()  # type: ignore[operator]
    assert info.value.key == key


def test_public_names() -> None:
    """loss_figures and LossFigures are exported by the package."""
    assert seqpipe.loss_figures is loss_figures
    assert isinstance(seqpipe.loss_figures(1.0, tokens=1), seqpipe.LossFigures)
