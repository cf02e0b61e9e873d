"""Bench corpora in the shapes real text comes in (the words come from ``_corpus``'s writer).

``write_many_small_files``: a tree of small text files, one document each, with the spread a
real collection of notes or pages has: some blank files, some of a few words, most around the
asked size, a few several times larger, in nested directories.
"""

from __future__ import annotations

from pathlib import Path
from typing import Final

import numpy as np
from _corpus import CorpusWriter

BLANK_SHARE: Final = 0.03  # files with nothing but whitespace (readers skip them)
SHORT_SHARE: Final = 0.10  # files of a few words
LARGE_SHARE: Final = 0.02  # files 4-12 times the asked size
BYTES_PER_TOKEN: Final = 6  # about, for the writer's English-like words with their separators


def write_many_small_files(directory: Path, files: int, approx_bytes: int, seed: int) -> int:
    """Write ``files`` text files of about ``approx_bytes`` each (one document per file, no blank
    line inside) under ``directory`` in nested subdirectories; return the bytes written."""
    rng = np.random.Generator(np.random.PCG64(seed))
    kind = rng.random(files)
    sizes = np.maximum(1, rng.lognormal(np.log(approx_bytes), 0.35, files)).astype(np.int64)
    short = (kind >= BLANK_SHARE) & (kind < BLANK_SHARE + SHORT_SHARE)
    sizes[short] = rng.integers(3, 60, int(short.sum()))
    large = kind >= 1.0 - LARGE_SHARE
    sizes[large] *= rng.integers(4, 13, int(large.sum()))
    sizes[kind < BLANK_SHARE] = 0
    writer = CorpusWriter(seed=seed)
    # one stream of paragraphs, joined into one paragraph and cut into files after a space
    text = writer.chunk(int(sizes.sum()) // BYTES_PER_TOKEN + 64).replace(b"\n\n", b"\n")
    while len(text) < sizes.sum() + 32 * len(sizes):
        text += b" " + writer.chunk(int(sizes.sum()) // BYTES_PER_TOKEN // 4 + 64).replace(b"\n\n", b"\n")
    total = at = 0
    for i, size in enumerate(sizes.tolist()):
        path = directory / f"shelf-{i % 7}" / f"box-{i % 13:02d}" / f"note-{i:06d}.txt"
        path.parent.mkdir(parents=True, exist_ok=True)
        if size == 0:
            body = b" \n" if i % 2 else b""
        else:
            cut = text.find(b" ", at + size)
            cut = len(text) if cut < 0 else cut
            body = text[at:cut].strip() + b"\n"
            at = cut + 1
        path.write_bytes(body)
        total += len(body)
    return total
