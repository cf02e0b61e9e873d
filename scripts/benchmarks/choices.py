"""The measurements behind choices the code explains (DEVELOPERS.md, "Where the time goes").

Each line is the cost of the alternative divided by the cost of what the code does, both timed
in this run (best of several calls), so a ratio above 1 means the choice still pays. Not a
bench part (nothing is judged): run it after upgrading numpy or pyarrow, or on a new machine.

    python scripts/benchmarks/choices.py
"""

from __future__ import annotations

import sys
import tempfile
import timeit
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from seqpipe.demo import write_demo_corpus
from seqpipe.report.ngrams import positions, runs
from seqpipe.sources.text import _PARAGRAPH_SEPARATOR_LF, PARAGRAPH_SEPARATOR
from seqpipe.tokenizers.words import _ASCII_CLASS, _SPACE


def best(fn: Callable[[], Any], number: int) -> float:
    """Seconds per call: the fastest of three rounds of ``number`` calls."""
    return min(timeit.repeat(fn, number=number, repeat=3)) / number


def line(name: str, alternative: Callable[[], Any], chosen: Callable[[], Any], number: int, detail: str) -> None:
    ratio = best(alternative, number) / best(chosen, number)
    print(f"{name}: {ratio:.2f} {detail}", flush=True)


def demo_bytes() -> bytes:
    """The first MB of the demo corpus's logbook text (LF line ends, blank-line paragraphs): the
    size of one read batch (DEFAULT_BATCH_BYTES)."""
    with tempfile.TemporaryDirectory(prefix="seqpipe-choices-") as tmp:
        files = write_demo_corpus(Path(tmp), documents=400)
        return b"".join(p.read_bytes() for p in sorted(files) if p.suffix == ".txt")[: 1 << 20]


def main() -> None:
    rng = np.random.default_rng(0)
    text = demo_bytes()
    data = np.frombuffer(text, dtype=np.uint8)
    print(f"numpy {np.__version__}; {len(text)} bytes of demo text", flush=True)

    chunk = rng.integers(0, 50_000, 1 << 20).astype(np.uint16)
    step = chunk.itemsize
    line(
        "stream.window_view",
        lambda: sliding_window_view(chunk, 257),
        lambda: np.ndarray((len(chunk) - 256, 257), chunk.dtype, buffer=chunk, strides=(step, step)),
        2000,
        "sliding_window_view vs the ndarray constructor, one 1M-token chunk, windows of 257",
    )
    line(
        "words.take",
        lambda: _ASCII_CLASS[data],
        lambda: np.take(_ASCII_CLASS, data),
        200,
        "table[a] vs np.take(table, a) over the demo text's bytes",
    )
    keep = np.take(_ASCII_CLASS, data) != _SPACE
    line(
        "words.compress",
        lambda: data[keep],
        lambda: np.compress(keep, data),
        200,
        "a[mask] vs np.compress(mask, a), mask: the demo text's non-space bytes",
    )
    hashes = rng.integers(0, 1 << 22, 4_000_000).astype(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
    line(
        "leakage.distinct",
        lambda: np.unique(hashes),
        lambda: runs(np.sort(hashes))[0],
        3,
        "np.unique vs sort and runs, 4M 64-bit hashes with repeats",
    )
    table = np.sort(rng.integers(0, 1 << 62, 8_000_000, dtype=np.int64))
    query = rng.choice(table, 2_000_000)
    line(
        "ngrams.positions",
        lambda: np.searchsorted(table, query),
        lambda: positions(table, query),
        3,
        "searchsorted in query order vs positions() (sorted queries), 2M queries into 8M keys",
    )
    lf = np.uint8(10)
    cr = np.uint8(13)

    def two_temporaries() -> np.ndarray:
        fresh = data.copy()
        return np.flatnonzero((fresh == cr) | (fresh == lf))

    def one_temporary() -> np.ndarray:
        fresh = data.copy()
        mask = fresh == cr
        mask |= fresh == lf
        return np.flatnonzero(mask)

    line(
        "fast_text.one_temporary",
        two_temporaries,
        one_temporary,
        200,
        "(a == CR) | (a == LF) vs an in-place |=, on a fresh copy of the demo text",
    )
    line(
        "text.lf_separator",
        lambda: sum(1 for _ in PARAGRAPH_SEPARATOR.finditer(text)),
        lambda: sum(1 for _ in _PARAGRAPH_SEPARATOR_LF.finditer(text)),
        20,
        "the any-line-end paragraph separator vs the LF-only one, scanning the demo text",
    )


if __name__ == "__main__":
    main()
