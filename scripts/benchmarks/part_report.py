"""Benchmarks of the corpus report: its n-gram counting, and how its peak memory grows with a split.

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

``report.rss_growth_per_token``: peak memory (max RSS) of a whole report (every section, 13-gram
leakage included) on a dataset of about 20M tokens minus that on one of about 2M, per added token
(``--quick``: 2M and 0.2M). Each report runs in a fresh Python process, which prints its own peak.
Datasets: English-like invented text from ``_corpus.py`` (seed 2), paragraphs as documents, the
word tokenizer, 90/5/5 splits.
"""

from __future__ import annotations

import json
import subprocess
import sys
from collections import Counter
from collections.abc import Iterator
from itertools import pairwise
from pathlib import Path

import numpy as np
from _corpus import write_corpus
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
    yield rss_growth(quick, workdir)


TOKENS_PER_BYTE = 1 / 4.1  # words and punctuation per byte of _corpus.py text (9 MB sample: 2.19M tokens)

RECIPE = """
[dataset]
name = "report-memory"
[[sources]]
kind = "text"
paths = "text/*.txt"
document = "paragraph"
[tokenizer]
kind = "words"
[splits]
train = 0.9
validation = 0.05
test = 0.05
"""

# The child's own peak: VmHWM of its address space. Not ru_maxrss, which on Linux keeps the
# parent's peak across the spawn (the child starts on the parent's memory until it runs exec),
# so after this file's 20M-token Counter it reported the parent's figure for both reports.
CHILD = """
import json, resource, sys
from seqpipe.report import write_report
write_report(sys.argv[1], sys.argv[2], progress=False)
try:
    with open("/proc/self/status") as f:
        peak = next(int(line.split()[1]) * 1024 for line in f if line.startswith("VmHWM:"))
except (OSError, StopIteration):
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps({"peak": peak}))
"""


def _dataset(workdir: Path, tokens: int) -> tuple[Path, int]:
    """A built dataset of about ``tokens`` tokens (reused if there); its path and token count."""
    from seqpipe import build
    from seqpipe.dataset import open_dataset
    from seqpipe.recipe import parse_recipe

    root = workdir / f"report-{tokens}"
    if not (root / "ds" / "manifest.json").is_file():
        write_corpus(root / "text", int(tokens / TOKENS_PER_BYTE), files=2)
        build(parse_recipe(RECIPE, root=root), root / "ds", workers=1, progress=False)
    ds = open_dataset(root / "ds")
    return root / "ds", sum(ds.split(name).num_tokens for name in ds.splits)


def _report_peak(dataset: Path, out: Path) -> int:
    """Peak RSS in bytes of one report of ``dataset``, made in a fresh process."""
    done = subprocess.run(
        [sys.executable, "-c", CHILD, str(dataset), str(out)], check=True, capture_output=True, text=True
    )
    return int(json.loads(done.stdout.strip().splitlines()[-1])["peak"])


def rss_growth(quick: bool, workdir: Path) -> Measure:
    small, large = (200_000, 2_000_000) if quick else (2_000_000, 20_000_000)
    (a, n_a), (b, n_b) = _dataset(workdir, small), _dataset(workdir, large)
    peak_a = _report_peak(a, workdir / "rep-a")  # peaks vary little between runs: one run each
    peak_b = _report_peak(b, workdir / "rep-b")
    return Measure(
        name="report.rss_growth_per_token",
        ratio=(peak_b - peak_a) / (n_b - n_a),
        target=8.0,
        detail=f"(peak {peak_b / 2**20:.0f} MiB at {n_b:,} tokens - {peak_a / 2**20:.0f} MiB at {n_a:,}, "
        "bytes per added token; each report in a fresh process"
        + (
            "; quick sizes are below the report's fixed working sizes (groups of 1M tokens, partitions of "
            "1M rows), which this growth then includes: the target is for the full sizes)"
            if quick
            else ")"
        ),
        higher_is_better=False,
    )
