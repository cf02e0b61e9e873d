"""Quality steps: near-duplicate removal and the quality filters with redaction, each against the
same build without them.

The corpus is the English-like invented text of ``_corpus.py`` with the eight most frequent
invented words replaced by the English function words the ``function_words`` filter counts (so
its prose passes that filter as real prose would), plus planted material of an invented
river-ferry office:

- near-copies: about 3% of documents repeat an earlier document with one word changed, upper-cased
  with one word changed, or with one sentence dropped; each is planted only when the exact
  Jaccard similarity of its 5-word shingle set to the original's (after lower-casing, as the
  recipe does) is at least 0.93, clearly above the step's threshold 0.8;
- contact details (e-mail addresses at example.* domains, documentation IP addresses, drama-range
  telephone numbers, a test card number) in about 2% of documents;
- junk documents the filters should drop (symbols only, one word repeated, a long unbroken line,
  repeated lines, a word list) in about 1% of documents.

A planted copy is found when its document hash (XXH3-128 of its cleaned text, the documents
table's ``hash``) is absent from the built dataset while its original's is present; the line
fails (raises) when any planted copy stays or any original is gone.
"""

from __future__ import annotations

import random
import re
import shutil
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import xxhash
from _corpus import NUMBERS, CorpusWriter, _table
from common import Measure

from seqpipe import BuildResult, build
from seqpipe.clean.function_words import FUNCTION_WORDS
from seqpipe.dataset import open_dataset
from seqpipe.recipe import Recipe, parse_recipe

MB = 1_000_000
FILES = 4
WORKERS = 2  # as the build part's two-worker line
SHINGLE = 5
MIN_JACCARD = 0.93  # planted copies: 98 hashes put a pair at 0.93 below 0.8 with probability 1.3e-5 (binomial tail)
NEAR_SHARE = 0.03
CONTACT_SHARE = 0.02
JUNK_SHARE = 0.01

HEAD = """
[dataset]
name = "bench-quality"
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "paragraph"
[[clean]]
kind = "lowercase"
"""
TAIL = """
[tokenizer]
kind = "words"
literal_reserved = true
[vocabulary]
reserved = ["<pad>", "<unk>", "<bos>", "<eos>", "<email>", "<ip>", "<card>", "<phone>"]
[splits]
train = 1.0
validation = 0.0
test = 0.0
[shards]
tokens = 8388608
"""
STEPS = {
    "dedupe": ['kind = "dedupe"'],
    "near": ['kind = "dedupe"', 'kind = "near_dedupe"'],
    "plain": [],
    "filters": [
        'kind = "letter_share"',
        'kind = "repeated_lines"',
        'kind = "repeated_ngrams"',
        'kind = "word_length"',
        'kind = "longest_line"',
        'kind = "function_words"',
        'kind = "redact"',
    ],
}

CONTACTS = (
    "Write to clerk{n}@ferry-office.example about lost tickets.",
    "The fare box at pier {k} reports to 192.0.2.{k} and 2001:db8:{k:x}::7.",
    "Call the night ferry desk on +44 1632 960{n3} before the last crossing.",
    "A season ticket was paid with card 4111 1111 1111 1111 and refunded.",
    "Timetable queries: desk-{n}@river-crossing.example or (0161) 496 0{n3}.",
)


class ProseWriter(CorpusWriter):
    """``CorpusWriter`` text whose most frequent words are English function words."""

    def __init__(self, seed: int) -> None:
        super().__init__(seed=seed)
        fw = FUNCTION_WORDS["en"]
        words = (*fw, *self.words[len(fw) :])
        inner = [" ", ", ", "; "]
        ends = [m + tail for tail in (" ", "\n", "\n\n") for m in (".", "?", "!")]
        pieces = [*words, *(w[0].upper() + w[1:] for w in words), *NUMBERS, *inner, *ends]
        self.words = words
        self._flat, self._starts, self._lengths = _table(pieces)  # same piece order as the parent


def shingles(text: str) -> set[tuple[str, ...]]:
    w = text.lower().split()
    if len(w) < SHINGLE:
        return {tuple(w)}
    return {tuple(w[i : i + SHINGLE]) for i in range(len(w) - SHINGLE + 1)}


def jaccard(a: str, b: str) -> float:
    sa, sb = shingles(a), shingles(b)
    return len(sa & sb) / len(sa | sb)


_SENTENCE_END = re.compile(r"(?<=[.?!])[ \n]")


def near_copy(text: str, variant: int, rng: random.Random) -> str:
    """One planted variant of ``text``: 0 one word changed, 1 upper-cased with one word
    changed, 2 one sentence dropped."""
    if variant == 2:
        sentences = _SENTENCE_END.split(text)
        if len(sentences) < 2:
            return text
        del sentences[rng.randrange(len(sentences))]
        return " ".join(sentences)
    words = text.split(" ")
    i = rng.randrange(len(words))
    words[i] = "ferrywright" + words[i][-1:] if words[i] else "ferrywright"
    out = " ".join(words)
    return out.upper() if variant == 1 else out


def junk(k: int) -> str:
    kinds = (
        "#### ---- **** //// ==== ++++ #### ---- ****",
        " ".join(["toll"] * 300),
        "QmFzZTY0" * 200,
        "\n".join(["Ferry times see board."] * 12),
        " ".join(f"pier{j}" for j in range(80)),
    )
    return kinds[k % len(kinds)]


def contact(k: int) -> str:
    return CONTACTS[k % len(CONTACTS)].format(n=k, k=k % 250 + 1, n3=f"{k % 1000:03d}")


class Planted:
    """What the corpus holds on purpose: (original, copy) texts, junk texts, contact counts."""

    def __init__(self) -> None:
        self.pairs: list[tuple[str, str, int]] = []
        self.junk: list[str] = []
        self.contacts = 0


def write_corpus(root: Path, total: int) -> Planted:
    """Files under ``root/corpus`` of about ``total`` bytes in all; what was planted."""
    rng = random.Random(19)
    writer = ProseWriter(seed=5)
    planted = Planted()
    per_file = total // FILES
    long_docs: list[str] = []  # earlier originals long enough to plant a copy of
    used: set[int] = set()
    for f in range(FILES):
        out: list[str] = []
        size = 0
        while size < per_file:
            text = writer.chunk(1 << 16).decode("utf-8")
            for doc in text.split("\n\n"):
                doc = doc.strip("\n")
                if not doc:
                    continue
                if size >= per_file:  # the file is full: the rest of the chunk is not used
                    break
                r = rng.random()
                if r < JUNK_SHARE:
                    planted.junk.append(junk(len(planted.junk)))
                    out.append(planted.junk[-1])
                elif r < JUNK_SHARE + CONTACT_SHARE:
                    doc = f"{doc} {contact(planted.contacts)}"
                    planted.contacts += 1
                elif r < JUNK_SHARE + CONTACT_SHARE + NEAR_SHARE and long_docs:
                    for _ in range(8):  # a few tries for a copy clearly above the threshold
                        j = rng.randrange(len(long_docs))
                        if j in used:
                            continue
                        copy = near_copy(long_docs[j], len(planted.pairs) % 3, rng)
                        if jaccard(long_docs[j], copy) >= MIN_JACCARD:
                            used.add(j)
                            planted.pairs.append((long_docs[j], copy, len(planted.pairs) % 3))
                            out.append(copy)
                            break
                out.append(doc)
                if doc.count(" ") >= 150:
                    long_docs.append(doc)
                size += len(doc) + 2
        path = root / "corpus" / f"ferry-{f:03d}.txt"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("\n\n".join(out) + "\n", encoding="utf-8")
    return planted


def recipe_for(root: Path, name: str) -> Recipe:
    text = HEAD + "".join(f"[[clean]]\n{s}\n" for s in STEPS[name]) + TAIL
    return parse_recipe(text, root)


def timed(recipe: Recipe, out: Path) -> tuple[float, BuildResult]:
    t0 = time.perf_counter()
    result = build(recipe, out, workers=WORKERS, progress=False)
    seconds = time.perf_counter() - t0
    if result.parts_reused:
        raise RuntimeError("a timed build reused cached parts")
    return seconds, result


def hashes_of(directory: Path | str) -> set[bytes]:
    table = open_dataset(directory).split("train").documents
    return set(table.column("hash").to_pylist())


def digest(text: str) -> bytes:
    return xxhash.xxh3_128_digest(text.lower().encode("utf-8"))


def best_pair(root: Path, work: Path, names: tuple[str, str], repeat: int) -> dict[str, tuple[float, BuildResult]]:
    """Best time of ``repeat`` alternating builds of each named recipe; the last result of each kept."""
    best: dict[str, tuple[float, BuildResult]] = {}
    for i in range(repeat):
        for name in names:
            out = work / f"{name}-{i}"
            seconds, result = timed(recipe_for(root, name), out)
            if name not in best or seconds < best[name][0]:
                if name in best:
                    shutil.rmtree(best[name][1].directory, ignore_errors=True)
                best[name] = (seconds, result)
            else:
                shutil.rmtree(out, ignore_errors=True)
    return best


def check_near(planted: Planted, near: BuildResult) -> str:
    kept = hashes_of(near.directory)
    missed = [p for p in planted.pairs if digest(p[1]) in kept]
    lost = [p for p in planted.pairs if digest(p[0]) not in kept]
    if missed or lost:
        raise RuntimeError(
            f"near_dedupe kept {len(missed)} of {len(planted.pairs)} planted near-copies "
            f"and dropped {len(lost)} originals"
        )
    by = np.bincount([v for _, _, v in planted.pairs], minlength=3)
    return (
        f"all {len(planted.pairs)} planted near-copies removed ({by[0]} one word changed, {by[1]} upper-cased "
        f"with one word changed, {by[2]} a sentence dropped; Jaccard >= {MIN_JACCARD})"
    )


def check_filters(planted: Planted, filtered: BuildResult) -> str:
    kept = hashes_of(filtered.directory)
    stayed = [j for j in planted.junk if digest(j) in kept]
    if stayed:
        raise RuntimeError(f"the quality filters kept {len(stayed)} of {len(planted.junk)} planted junk documents")
    summary = filtered.manifest["summary"]
    redacted = sum(summary["redacted"].values())
    if redacted < planted.contacts:
        raise RuntimeError(f"redact replaced {redacted} contact details, fewer than the {planted.contacts} planted")
    dropped = sum(summary["dropped"].values())
    return (
        f"all {len(planted.junk)} planted junk documents dropped, {dropped} documents dropped in all; "
        f"{redacted} contact details replaced ({planted.contacts} documents with some planted)"
    )


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    size = 3 * MB if quick else 100 * MB
    repeat = 1 if quick else 3
    root = workdir / "q"
    planted = write_corpus(root, size)
    for p in sorted((root / "corpus").glob("*.txt")):
        p.read_bytes()  # page cache warm for every build
    total = sum(p.stat().st_size for p in (root / "corpus").glob("*.txt"))

    best = best_pair(root, workdir, ("dedupe", "near"), repeat)
    (t_exact, _), (t_near, near) = best["dedupe"], best["near"]
    found = check_near(planted, near)
    summary = near.manifest["summary"]
    yield Measure(
        "clean.near_dedupe_overhead",
        t_exact / t_near,
        0.6,
        f"(dedupe + near_dedupe {t_near:.2f} s vs dedupe {t_exact:.2f} s over {total / MB:.0f} MB, workers={WORKERS}, "
        f"best of {repeat}; {summary['near_duplicates_dropped']} near-duplicates and "
        f"{summary['duplicates_dropped']} duplicates dropped; {found})",
    )
    for name in ("dedupe", "near"):
        shutil.rmtree(best[name][1].directory, ignore_errors=True)

    best = best_pair(root, workdir, ("plain", "filters"), repeat)
    (t_plain, _), (t_filters, filtered) = best["plain"], best["filters"]
    found = check_filters(planted, filtered)
    yield Measure(
        "clean.filters_overhead",
        t_plain / t_filters,
        0.7,
        f"(six quality filters + redact {t_filters:.2f} s vs without {t_plain:.2f} s over {total / MB:.0f} MB, "
        f"workers={WORKERS}, best of {repeat}; {found})",
    )
