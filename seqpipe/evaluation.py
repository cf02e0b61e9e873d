"""The result of ``Split.evaluation``: one rank's exact evaluation pass and what it covers."""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

from seqpipe.errors import StreamError
from seqpipe.windows import Batch, BatchStream


@dataclass(frozen=True, slots=True)
class Evaluation:
    """An exact evaluation pass over a split (``Split.evaluation``).

    ``batches`` is this rank's stream in order ``evaluation``; over all ranks the ``loss_mask``
    cells number exactly ``targets`` (every target of the split once). ``text_bytes`` is the
    UTF-8 size of the split's text when the manifest records it, else None.
    """

    batches: BatchStream
    targets: int
    text_bytes: int | None

    def __iter__(self) -> Iterator[Batch]:
        return iter(self.batches)

    def __len__(self) -> int:
        return len(self.batches)

    def perplexity(self, total_loss: float) -> float:
        """``exp(total_loss / targets)`` for the summed natural-log loss of every rank's masked targets."""
        if self.targets == 0:
            raise StreamError("perplexity: the pass scores no targets (the split has fewer than 2 tokens)")
        return math.exp(total_loss / self.targets)

    def bits_per_byte(self, total_loss: float) -> float:
        """The summed natural-log loss of the pass in bits per byte of text."""
        if not self.text_bytes:
            raise StreamError("bits_per_byte: the manifest records no text size for this split")
        return total_loss / math.log(2) / self.text_bytes
