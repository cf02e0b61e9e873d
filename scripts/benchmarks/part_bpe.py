"""Byte-pair encoding: training against a recount-everything trainer, encoding against the bare regex split,
the default chunking's compression against the chunking rule it replaced, and training and whole builds
on text in many scripts.

The text is invented: English-like pseudo-words built from syllables with a fixed seed, drawn
with Zipf-like frequencies into sentences and documents; and, for the ``multiscript`` lines,
invented words in a dozen scripts (``_scripts_corpus.py``), which give far more distinct chunks.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import random
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import regex
from _scripts_corpus import write_multiscript
from common import Measure, best_time

from seqpipe import build
from seqpipe.recipe import parse_recipe
from seqpipe.tokenizers.bpe import BpeEncoder, BpeTokenizer
from seqpipe.vocab import VocabSpec

ROOT = Path(__file__).resolve().parents[2]
SPEC = VocabSpec()
START = len(SPEC.reserved) + 256  # reserved tokens + byte alphabet
# The chunking rule before the named presets (a space led the word after it), kept here only as
# the baseline of bpe.chunking_compression_vs_previous.
PREVIOUS_PATTERN = (
    r" ?[\p{L}\p{M}]+(?:['\u2019][\p{L}\p{M}]+)*"
    r"| ?\p{N}+"
    r"| ?[^\s\p{L}\p{M}\p{N}]+"
    r"|\s+(?= \S)"
    r"|\s+"
)
_ONSETS = [
    "",
    "b",
    "br",
    "d",
    "f",
    "g",
    "gl",
    "h",
    "k",
    "l",
    "m",
    "n",
    "p",
    "qu",
    "r",
    "s",
    "sk",
    "st",
    "t",
    "th",
    "v",
    "w",
    "z",
]
_VOWELS = ["a", "e", "i", "o", "u", "ai", "ea", "ou", "y"]
_CODAS = ["", "", "n", "r", "l", "s", "th", "nd", "rk", "st", "m"]


def make_documents(size: int, seed: int = 20240611) -> list[str]:
    """About ``size`` characters of invented English-like documents, the same for a seed."""
    rng = random.Random(seed)
    words = sorted(
        {
            "".join(
                rng.choice(_ONSETS) + rng.choice(_VOWELS) + rng.choice(_CODAS)
                for _ in range(rng.choice((1, 1, 2, 2, 3)))
            )
            for _ in range(6000)
        }
    )
    gen = np.random.default_rng(seed)
    weights = 1.0 / np.arange(1, len(words) + 1) ** 1.07  # Zipf-like word frequencies
    order = gen.permutation(len(words))  # frequency rank unrelated to spelling
    n_words = size // 8  # about 8 characters per word with its space and punctuation
    picks = gen.choice(len(words), size=n_words, p=weights / weights.sum())
    tokens = [words[order[i]] for i in picks.tolist()]
    docs: list[str] = []
    pos = 0
    while pos < n_words:
        sentences = []
        for _ in range(int(gen.integers(8, 30))):
            n = int(gen.integers(4, 18))
            sent = tokens[pos : pos + n]
            pos += n
            if not sent:
                break
            sent[0] = sent[0].capitalize()
            if gen.random() < 0.3:
                sent.insert(int(gen.integers(1, len(sent) + 1)), str(int(gen.integers(1, 2000))))
            if len(sent) > 6 and gen.random() < 0.5:
                sent[2] += ","
            sentences.append(" ".join(sent) + str(gen.choice([".", ".", ".", "?", "!", ";"])))
        docs.append(" ".join(sentences) + "\n")
    return docs


def _naive_reference() -> Callable[..., Any]:
    # the very trainer the tests prove the fast one against, so the baseline is known to agree;
    # the test module imports the shared contract suite beside it, as under pytest
    tests = str(ROOT / "tests")
    if tests not in sys.path:
        sys.path.append(tests)
    spec = importlib.util.spec_from_file_location("_bpe_reference", ROOT / "tests" / "test_bpe.py")
    assert spec and spec.loader
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    naive: Callable[..., Any] = module.naive_merges
    return naive


def _counts(tok: BpeTokenizer, docs: list[str]) -> pa.Table:
    seg = tok.segment(docs)
    freq = np.bincount(seg.codes, minlength=len(seg.keys))
    return pa.table({"key": seg.keys.cast(pa.binary()), "count": pa.array(freq, pa.int64())})


def _symbols_after(enc: BpeEncoder, keys: pa.Array) -> list[list[bytes]]:
    # encoding a training chunk reproduces its segmentation at that point of training (tested)
    values, offsets = enc.piece_ids(keys)
    tokens = [bytes(t) for t in enc.vocabulary.tokens.to_pylist()]
    flat = [tokens[i] for i in values.tolist()]
    return [flat[offsets[j] : offsets[j + 1]] for j in range(len(keys))]


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    """``bpe.train_vs_naive``, ``bpe.encode_vs_regex_split``, ``bpe.chunking_compression_vs_previous``,
    ``bpe.multiscript_train_vs_naive`` and ``bpe.multiscript_build_vs_bytes``."""
    yield from _english_like(quick)
    yield from _multiscript(quick, workdir)


def _english_like(quick: bool) -> Iterator[Measure]:
    docs = make_documents(200_000 if quick else 5_000_000)
    text = "".join(docs)
    n_merges = 500 if quick else 4000
    sample = 5 if quick else 10
    tok = BpeTokenizer(min_pair_count=2)
    spec = dataclasses.replace(SPEC, cap=START + n_merges)
    counts = _counts(tok, docs)
    keys = counts.column("key").combine_chunks()

    fast = best_time(lambda: tok.fit(counts, spec))
    enc = tok.fit(counts, spec)
    if len(enc.merges) != n_merges:
        raise RuntimeError(f"training stopped after {len(enc.merges)} of {n_merges} merges")

    naive_total, points = _naive_seconds(tok, counts, enc, START, sample)
    yield Measure(
        "bpe.train_vs_naive",
        naive_total / fast,
        20,
        f"({n_merges} merges on {len(text) / 1e6:.1f} MB, {len(keys)} distinct chunks: fast {fast:.2f} s best of 3; "
        f"naive {naive_total:.1f} s extrapolated from {sample} merges timed at each of {points})",
    )

    pattern = regex.compile(tok.pattern)
    split = best_time(lambda: pattern.findall(text))

    def encode_all(encoder: BpeEncoder, *, empty_cache: bool = False) -> None:
        if empty_cache:
            encoder.forget()  # as if loaded in a new process: every distinct chunk is merged once
        for i in range(0, len(docs), 256):  # batches, as a build encodes
            encoder.encode_batch(docs[i : i + 256])

    empty = best_time(lambda: encode_all(enc, empty_cache=True))
    enc = tok.fit(counts, spec)  # the state a build encodes with: the training chunks' ids as training left them
    after = best_time(lambda: encode_all(enc))
    ids, _ = enc.encode_batch(docs)
    if enc.decode(ids) != text:
        raise RuntimeError("encode/decode did not round-trip the benchmark text")
    yield Measure(
        "bpe.encode_vs_regex_split",
        split / after,
        0.25,
        f"(encoding the training text after training, batches of 256 docs: {len(text) / after / 1e6:.1f} MB/s; "
        f"findall over the text {len(text) / split / 1e6:.1f} MB/s; from an empty chunk cache "
        f"{len(text) / empty / 1e6:.1f} MB/s, ratio {split / empty:.2f}; {len(ids) / len(text.encode()):.3f} "
        "tokens/byte)",
    )

    # Compression of the default chunking against the previous rule: both trained to the same
    # vocabulary size on the same text, then encoding it; tokens per byte, previous / default.
    previous = BpeTokenizer(min_pair_count=2, chunking="custom", chunk_regex=PREVIOUS_PATTERN)
    before = _tokens_per_byte(previous, docs, text, spec)
    now = len(ids) / len(text.encode())
    yield Measure(
        "bpe.chunking_compression_vs_previous",
        before / now,
        0.98,
        f"(tokens per byte at {START + n_merges} ids on {len(text) / 1e6:.1f} MB: previous rule {before:.4f}, "
        f"default {tok.chunking!r} {now:.4f}, ratio {before / now:.4f}; above 1 the default needs fewer tokens)",
    )


def _naive_seconds(
    tok: BpeTokenizer, counts: pa.Table, enc: BpeEncoder, start: int, sample: int
) -> tuple[float, list[int]]:
    """Seconds the naive trainer would take for ``enc``'s merges, and the merge counts it was timed at.

    The naive trainer recounts every pair each merge; its cost per merge falls as chunks shrink,
    so it is timed for ``sample`` merges at five points of training and integrated."""
    naive = _naive_reference()
    keys = counts.column("key").combine_chunks()
    freqs = counts.column("count").to_pylist()
    n_merges = len(enc.merges)
    points = [0, n_merges // 4, n_merges // 2, 3 * n_merges // 4, n_merges - sample]
    per_merge = []
    for m in points:
        state = tok.fit(counts, dataclasses.replace(SPEC, cap=start + m))
        words = _symbols_after(state, keys)
        t0 = time.perf_counter()
        got, _ = naive(words, freqs, 0, sample, tok.min_pair_count)
        per_merge.append((time.perf_counter() - t0) / sample)
        v = enc.vocabulary
        if got != [(v.token(a), v.token(b)) for a, b, _ in enc.merges[m : m + sample]]:
            raise RuntimeError(f"naive and fast trainers disagree after {m} merges")
    return float(np.trapezoid(per_merge, points) + per_merge[-1] * sample), points


_SCRIPTS_RECIPE = """
[dataset]
name = "bench-scripts"
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "line"
"""


def _multiscript(quick: bool, workdir: Path) -> Iterator[Measure]:
    """Training (chars base) and whole builds on invented text in many scripts."""
    path = workdir / "scripts" / "corpus" / "scripts.txt"
    size = write_multiscript(path, 250_000 if quick else 7_000_000, seed=5)
    text = path.read_text(encoding="utf-8")
    docs = text.splitlines(keepends=True)
    n_merges = 300 if quick else 16_000
    sample = 3 if quick else 5
    tok = BpeTokenizer(base="chars", min_pair_count=2)
    counts = _counts(tok, docs)
    start = len(SPEC.reserved) + len(set(text))  # reserved tokens + the characters seen
    spec = dataclasses.replace(SPEC, cap=start + n_merges)
    fast = best_time(lambda: tok.fit(counts, spec), repeat=3 if quick else 2)
    enc = tok.fit(counts, spec)
    if len(enc.merges) != n_merges:
        raise RuntimeError(f"training stopped after {len(enc.merges)} of {n_merges} merges")
    naive_total, points = _naive_seconds(tok, counts, enc, start, sample)
    yield Measure(
        "bpe.multiscript_train_vs_naive",
        naive_total / fast,
        100,
        f"(chars base, {n_merges} merges on {size / 1e6:.1f} MB in {len(set(text))} characters, {counts.num_rows} "
        f"distinct chunks: fast {fast:.2f} s best of {3 if quick else 2}; naive {naive_total:.1f} s extrapolated "
        f"from {sample} merges timed at each of {points})",
    )

    root = path.parent.parent
    recipes = {
        "bytes": _SCRIPTS_RECIPE + '[tokenizer]\nkind = "bytes"\n',
        "bpe": _SCRIPTS_RECIPE + f'[tokenizer]\nkind = "bpe"\nbase = "chars"\n[vocabulary]\ncap = {start + n_merges}\n',
    }
    seconds: dict[str, float] = {}
    for name, text_of in recipes.items():
        recipe = parse_recipe(text_of, root)
        runs = []
        for i in range(2 if quick else 3):
            t0 = time.perf_counter()
            build(recipe, workdir / f"scripts-{name}-{i}", workers=1, progress=False)
            runs.append(time.perf_counter() - t0)
        seconds[name] = min(runs)
    yield Measure(
        "bpe.multiscript_build_vs_bytes",
        seconds["bytes"] / seconds["bpe"],
        0.15,
        f"(whole build of {size / 1e6:.1f} MB in many scripts, one document per line, best of {len(runs)} fresh "
        f"builds each: byte-pair chars base at cap {start + n_merges} {seconds['bpe']:.2f} s, bytes "
        f"{seconds['bytes']:.2f} s)",
    )


def _tokens_per_byte(tok: BpeTokenizer, docs: list[str], text: str, spec: VocabSpec) -> float:
    enc = tok.fit(_counts(tok, docs), spec)
    ids, _ = enc.encode_batch(docs)
    return len(ids) / len(text.encode())
