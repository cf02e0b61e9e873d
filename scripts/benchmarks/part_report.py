"""Benchmark of the corpus report's n-gram counting.

``report.ngram_count_vs_counter``: bigram + trigram counts of one split (documents
respected) with :func:`seqpipe.report.ngrams.count_ngrams` (one sort of packed keys)
against ``collections.Counter`` over Python tuples of the same ids, document by
document, both on the whole split in the same run. The Counter runs once at full size
(about half a minute here); an earlier version timed it on a 2M-token prefix and scaled
linearly, which understated it, since a Counter slows as it outgrows the caches.

Input (deterministic, seed 7): a 32,000-id vocabulary; a pool of 200,000 "phrases" of
2-12 ids drawn from a Zipf-Mandelbrot law (p(r) ~ 1/(r + 2.7)); the split is phrases
drawn from the pool with the same law over the pool, cut into documents of geometric
length (mean 400 ids). Repeated phrases give the repeated n-grams of real text.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from itertools import pairwise
from pathlib import Path

import numpy as np
from common import Measure, best_time

from seqpipe.report.ngrams import count_ngrams, key_bits

VOCAB = 32_000
SEED = 7


def _zipf_mandelbrot(n: int) -> np.ndarray:
    p = 1.0 / (np.arange(1, n + 1) + 2.7)
    return p / p.sum()


def make_split(n_tokens: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Token ids and document ranges (starts, lengths) of the benchmark split."""
    rng = np.random.default_rng(SEED)
    pool_size = 200_000
    phrase_len = rng.integers(2, 13, size=pool_size)
    pool = rng.choice(VOCAB, size=int(phrase_len.sum()), p=_zipf_mandelbrot(VOCAB)).astype(np.uint16)
    pool_start = np.cumsum(phrase_len) - phrase_len
    picks = rng.choice(pool_size, size=n_tokens // 2 + 1, p=_zipf_mandelbrot(pool_size))  # >= n_tokens ids
    picks = picks[: int(np.searchsorted(np.cumsum(phrase_len[picks]), n_tokens)) + 1]
    lens = phrase_len[picks]
    pos = np.repeat(pool_start[picks] - (np.cumsum(lens) - lens), lens) + np.arange(int(lens.sum()))
    ids = pool[pos][:n_tokens]
    doc_lens = rng.geometric(1 / 400, size=n_tokens // 100 + 10)
    doc_lens = doc_lens[: int(np.searchsorted(np.cumsum(doc_lens), n_tokens)) + 1]
    doc_lens[-1] -= int(doc_lens.sum()) - n_tokens
    starts = np.cumsum(doc_lens) - doc_lens
    return ids, starts.astype(np.int64), doc_lens.astype(np.int64)


def counter_ngrams(ids: np.ndarray, starts: np.ndarray, lengths: np.ndarray) -> tuple[Counter[tuple[int, ...]], ...]:
    """The pure-Python way: tuples of each document's windows into two Counters."""
    bigrams: Counter[tuple[int, ...]] = Counter()
    trigrams: Counter[tuple[int, ...]] = Counter()
    values = ids.tolist()
    for s, m in zip(starts.tolist(), lengths.tolist(), strict=True):
        doc = values[s : s + m]
        bigrams.update(pairwise(doc))
        trigrams.update(zip(doc, doc[1:], doc[2:], strict=False))
    return bigrams, trigrams


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    n_tokens = 200_000 if quick else 20_000_000
    ids, starts, lengths = make_split(n_tokens)
    bits = key_bits(VOCAB)
    t_ours = best_time(lambda: count_ngrams(ids, (2, 3), bits=bits, starts=starts, lengths=lengths), repeat=5)
    t_counter = best_time(lambda: counter_ngrams(ids, starts, lengths), repeat=3 if quick else 1)
    yield Measure(
        name="report.ngram_count_vs_counter",
        ratio=t_counter / t_ours,
        target=20.0,
        detail=f"(Counter {t_counter:.2f} s / count_ngrams {t_ours:.3f} s, bigrams+trigrams of "
        f"{n_tokens:,} tokens in {len(starts):,} documents, 32k ids)",
    )
