"""Deterministic English-like synthetic text for the build benchmarks.

Nothing here comes from a real text: words are invented from random syllables, ranked so
short words are frequent, and drawn with a Zipf-like law (p(rank) ~ 1 / (rank + 2.7) ** 1.07,
a common-practice shape for word frequencies). Sentences start with a capital letter and end
in ``.``, ``?`` or ``!``; commas and semicolons appear inside them; some tokens are numbers
and about one word in twenty carries an accented letter (NFC, precomposed). Documents are
paragraphs: runs of sentences separated by one blank line.

Generation is numpy-only per chunk: token and separator choices are integer arrays, and the
output bytes are one gather from a flat table of piece bytes, so ~1 GB takes seconds to tens of
seconds rather than minutes. The vocabulary depends only on ``vocab_seed`` and ``words``, so
corpora of different sizes share it; the token stream depends on ``seed``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Final

import numpy as np

_ONSETS: Final = (
    "b",
    "d",
    "f",
    "g",
    "h",
    "k",
    "l",
    "m",
    "n",
    "p",
    "r",
    "s",
    "t",
    "v",
    "w",
    "z",
    "br",
    "dr",
    "gl",
    "kr",
    "pl",
    "st",
    "tr",
    "th",
    "sh",
    "ch",
)
_VOWELS: Final = ("a", "e", "i", "o", "u", "ai", "ou", "ea")
_ACCENTED: Final = ("é", "è", "ö", "å", "ü", "â", "ï", "ô")
_CODAS: Final = ("", "", "", "n", "r", "l", "s", "t", "m", "k")
# (separator after a token, weight) inside a sentence
_INNER: Final = ((" ", 0.93), (", ", 0.055), ("; ", 0.015))
# sentence ends: the mark, then a space, a line break, or (document end) a blank line
_ENDS: Final = (".", "?", "!")
_END_WEIGHTS: Final = (0.88, 0.07, 0.05)
MEAN_SENTENCE: Final = 14  # tokens
MEAN_DOCUMENT: Final = 6  # sentences
CHUNK_TOKENS: Final = 1 << 20


def invent_words(count: int, seed: int) -> tuple[str, ...]:
    """``count`` distinct invented words, shortest first (frequent words are short)."""
    rng = np.random.Generator(np.random.PCG64(seed))
    seen: set[str] = set()
    out: list[str] = []
    while len(out) < count:
        n_syl = int(rng.choice([1, 2, 3, 4], p=[0.3, 0.4, 0.22, 0.08]))
        parts = []
        for _ in range(n_syl):
            vowel = (
                _ACCENTED[int(rng.integers(len(_ACCENTED)))]
                if rng.random() < 0.02
                else _VOWELS[int(rng.integers(len(_VOWELS)))]
            )
            parts.append(_ONSETS[int(rng.integers(len(_ONSETS)))] + vowel + _CODAS[int(rng.integers(len(_CODAS)))])
        word = "".join(parts)
        if word not in seen:
            seen.add(word)
            out.append(word)
    # stable sort by length keeps the draw order among words of equal length
    return tuple(sorted(out, key=len))


NUMBERS: Final = tuple(str(n) for n in range(0, 200)) + tuple(str(y) for y in range(1890, 2031))


def _table(pieces: list[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Flat UTF-8 bytes of ``pieces`` with each piece's start and length."""
    encoded = [p.encode("utf-8") for p in pieces]
    lengths = np.array([len(b) for b in encoded], dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    flat = np.frombuffer(b"".join(encoded), dtype=np.uint8)
    return flat, starts, lengths


class CorpusWriter:
    """Writes English-like paragraphs; see the module docstring."""

    def __init__(self, *, words: int = 40_000, vocab_seed: int = 1, seed: int = 2, number_rate: float = 0.03) -> None:
        self.words = invent_words(words, vocab_seed)
        v = len(self.words)
        ranks = np.arange(v, dtype=np.float64)
        p = 1.0 / (ranks + 2.7) ** 1.07
        self._cdf = np.cumsum(p / p.sum())
        self._cdf[-1] = 1.0
        self._number_rate = number_rate
        self._rng = np.random.Generator(np.random.PCG64(seed))
        # piece table: words, Capitalized words, numbers, inner separators, sentence ends
        self._n_words = v
        self._n_numbers = len(NUMBERS)
        inner = [s for s, _ in _INNER]
        ends = [m + tail for tail in (" ", "\n", "\n\n") for m in _ENDS]
        pieces = [*self.words, *(w[0].upper() + w[1:] for w in self.words), *NUMBERS, *inner, *ends]
        self._flat, self._starts, self._lengths = _table(pieces)
        self._inner_base = 2 * v + self._n_numbers
        self._end_base = self._inner_base + len(inner)
        self._inner_cdf = np.cumsum([w for _, w in _INNER])
        self._end_cdf = np.cumsum(_END_WEIGHTS)

    def chunk(self, n: int) -> bytes:
        """``n`` tokens of text ending at a document end (the stream continues across calls)."""
        rng = self._rng
        v = self._n_words
        tok = np.searchsorted(self._cdf, rng.random(n), side="right").astype(np.int64)
        np.minimum(tok, v - 1, out=tok)
        is_num = rng.random(n) < self._number_rate
        tok[is_num] = 2 * v + rng.integers(0, self._n_numbers, int(is_num.sum()))
        sent_end = rng.random(n) < 1.0 / MEAN_SENTENCE
        sent_end[-1] = True
        starts = np.flatnonzero(np.concatenate([[True], sent_end[:-1]]))
        cap = starts[tok[starts] < v]
        tok[cap] += v  # the first word of a sentence is capitalized
        sep = self._inner_base + np.searchsorted(self._inner_cdf, rng.random(n) * self._inner_cdf[-1], side="right")
        ends = np.flatnonzero(sent_end)
        mark = np.searchsorted(self._end_cdf, rng.random(len(ends)) * self._end_cdf[-1], side="right")
        # after a sentence: blank line (document end), a line break, or a space
        r = rng.random(len(ends))
        tail = np.where(r < 1.0 / MEAN_DOCUMENT, 2, np.where(r < 0.3, 1, 0))
        tail[-1] = 2
        sep[ends] = self._end_base + tail * len(_ENDS) + mark
        seq = np.empty(2 * n, dtype=np.int64)
        seq[0::2] = tok
        seq[1::2] = sep
        lens = self._lengths[seq]
        out_start = np.cumsum(lens) - lens
        idx = np.repeat(self._starts[seq] - out_start, lens) + np.arange(int(lens.sum()), dtype=np.int64)
        return self._flat[idx].tobytes()

    def write(self, path: Path, size: int) -> int:
        """Write about ``size`` bytes (whole documents) to ``path``; return the bytes written."""
        path.parent.mkdir(parents=True, exist_ok=True)
        written = 0
        per_token = 7.0  # refined from each chunk, so the file ends close to ``size``
        with open(path, "wb") as fh:
            while written < size:
                want = int((size - written) / per_token) + 1
                data = self.chunk(max(64, min(CHUNK_TOKENS, want)))
                per_token = len(data) / max(64, min(CHUNK_TOKENS, want))
                fh.write(data)
                written += len(data)
        return written


def write_corpus(
    directory: Path, total_bytes: int, *, files: int = 4, seed: int = 2, vocab_seed: int = 1, words: int = 40_000
) -> list[Path]:
    """Write ``files`` text files of about ``total_bytes`` in all; return their paths (sorted)."""
    writer = CorpusWriter(words=words, vocab_seed=vocab_seed, seed=seed)
    paths = []
    for i in range(files):
        path = directory / f"log-{i:03d}.txt"
        writer.write(path, total_bytes // files)
        paths.append(path)
    return paths
