"""Scale-out and cache properties of the build: output bytes do not depend on the number of
workers or on how input files are cut into parts; the parts cache is reused exactly when only
steps after ingest change, and ``force`` re-reads everything."""

from __future__ import annotations

import random
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqpipe import BuildResult, build
from seqpipe.manifest import MANIFEST_NAME
from seqpipe.recipe import Recipe, parse_recipe
from seqpipe.sources.text import TextSource

# Invented words for a small corpus of our own (no outside text).
_WORDS = (
    "harbor",
    "skiff",
    "tide",
    "lantern",
    "rope",
    "mooring",
    "gull",
    "barge",
    "ledger",
    "crate",
    "fog",
    "pier",
    "quay",
    "oar",
    "keel",
    "ballast",
    "nöbel",
    "drüme",
    "sälk",
    "crossing",
)


def write_corpus(root: Path, files: int = 3, docs_per_file: int = 120, seed: int = 11) -> None:
    """Paragraph documents over a few files, with planted exact duplicates."""
    rng = random.Random(seed)
    corpus = root / "corpus"
    corpus.mkdir(parents=True, exist_ok=True)
    planted = "The Harbor fog rolled in; twelve crates waited at pier 4."
    for f in range(files):
        paras = []
        for d in range(docs_per_file):
            if d % 37 == 5:
                paras.append(planted)
                continue
            sentences = []
            for _ in range(rng.randint(1, 4)):
                words = [rng.choice(_WORDS) for _ in range(rng.randint(3, 14))]
                words[0] = words[0].capitalize()
                if rng.random() < 0.3:
                    words.insert(rng.randint(1, len(words)), str(rng.randint(0, 300)))
                sentences.append(" ".join(words) + rng.choice(".!?"))
            paras.append(" ".join(sentences))
        (corpus / f"log-{f:02d}.txt").write_text("\n\n".join(paras) + "\n", encoding="utf-8")


RECIPE = """
[dataset]
name = "scale-test"
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "paragraph"
{clean}
{dedupe}
[tokenizer]
kind = "{tokenizer}"
{tokenizer_extra}
[vocabulary]
min_count = {min_count}
cap = {cap}
[splits]
train = {train}
validation = {validation}
test = {test}
seed = {seed}
[shards]
tokens = {shard_tokens}
"""


def recipe_text(
    *,
    tokenizer: str = "words",
    tokenizer_extra: str = "",
    clean: str = "",
    min_count: int = 1,
    cap: int = 0,
    train: float = 0.8,
    validation: float = 0.1,
    test: float = 0.1,
    shard_tokens: int = 1500,
    seed: int = 0,
    dedupe: bool = True,
) -> str:
    # without a dedupe step the ingest tasks count their parts themselves; with one, count
    # tasks do after the driver has found the duplicates: both paths are exercised below
    return RECIPE.format(
        tokenizer=tokenizer,
        tokenizer_extra=tokenizer_extra,
        clean=clean,
        min_count=min_count,
        cap=cap,
        train=train,
        validation=validation,
        test=test,
        shard_tokens=shard_tokens,
        seed=seed,
        dedupe='[[clean]]\nkind = "dedupe"' if dedupe else "",
    )


def make_recipe(root: Path, **kw: Any) -> Recipe:
    return parse_recipe(recipe_text(**kw), root)


def dataset_files(directory: Path) -> dict[str, bytes]:
    """Every file of a built dataset (the private .seqpipe area excluded), by relative path."""
    out = {}
    for p in sorted(directory.rglob("*")):
        rel = p.relative_to(directory)
        if rel.parts[0] == ".seqpipe" or not p.is_file():
            continue
        out[rel.as_posix()] = p.read_bytes()
    return out


# Part size small enough that each ~16 KB corpus file is cut into several parts.
SMALL_PARTS = 2048


@pytest.fixture
def corpus_root(tmp_path: Path) -> Path:
    root = tmp_path / "src"
    write_corpus(root)
    return root


@pytest.mark.parametrize(("tokenizer", "cap", "dedupe"), [("words", 0, True), ("words", 0, False), ("bpe", 300, True)])
def test_one_and_two_workers_write_identical_bytes(
    corpus_root: Path, tmp_path: Path, tokenizer: str, cap: int, dedupe: bool
) -> None:
    """workers=1 (in-process) and workers=2 (this process and a spawned one) give the same
    manifest and file bytes."""
    recipe = make_recipe(corpus_root, tokenizer=tokenizer, cap=cap, dedupe=dedupe)
    one = build(recipe, tmp_path / "one", workers=1, progress=False, part_bytes=SMALL_PARTS)
    two = build(recipe, tmp_path / "two", workers=2, progress=False, part_bytes=SMALL_PARTS)
    assert one.parts_total > 3 * 2  # several parts per input file, or the test proves little
    assert sum(len(s["shards"]) for s in one.manifest["splits"].values()) > 3  # several shards
    files_one, files_two = dataset_files(one.directory), dataset_files(two.directory)
    assert files_one[MANIFEST_NAME] == files_two[MANIFEST_NAME]
    assert files_one == files_two
    assert one.fingerprint == two.fingerprint


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(part_bytes=st.integers(min_value=200, max_value=40_000), dedupe=st.booleans())
def test_output_does_not_depend_on_part_size(
    corpus_root: Path, tmp_path_factory: pytest.TempPathFactory, part_bytes: int, dedupe: bool
) -> None:
    """How input files are cut into parts never changes a byte of the dataset."""
    recipe = make_recipe(corpus_root, dedupe=dedupe)
    ref_dir = corpus_root.parent / f"reference-{dedupe}"
    if not (ref_dir / MANIFEST_NAME).exists():
        build(recipe, ref_dir, workers=1, progress=False)  # default part size: one part per file
    out = tmp_path_factory.mktemp("parts")
    got = build(recipe, out, workers=1, progress=False, part_bytes=part_bytes)
    assert dataset_files(got.directory) == dataset_files(ref_dir)


class ReadCounter:
    """Counts the file parts TextSource.read_many is asked to read in this process (workers=1
    runs tasks inline): an ingest task reads its part's members through it."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.calls = 0
        original = TextSource.read_many

        def counting(source: TextSource, parts: Any, *args: Any, **kwargs: Any) -> Iterator[Any]:
            self.calls += len(parts)
            return original(source, parts, *args, **kwargs)

        monkeypatch.setattr(TextSource, "read_many", counting)

    def take(self) -> int:
        n, self.calls = self.calls, 0
        return n


def run(recipe: Recipe, out: Path, **kw: Any) -> BuildResult:
    return build(recipe, out, workers=1, progress=False, part_bytes=SMALL_PARTS, **kw)


@pytest.mark.parametrize(
    "change",
    [
        {"shard_tokens": 700},
        {"train": 0.7, "validation": 0.2},
        {"seed": 3},
        {"min_count": 2},
        {"train": 0.7, "validation": 0.2, "dedupe": False},
        {"seed": 3, "dedupe": False},
    ],
)
def test_cache_reused_when_only_later_steps_change(
    corpus_root: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, change: dict[str, Any]
) -> None:
    """Changing shards, splits or vocabulary settings re-reads no source file, and the cached
    build equals a fresh build of the changed recipe. Without dedupe, the fresh build counts in
    its ingest tasks and the cached one in count tasks over the stored parts: same bytes."""
    reads = ReadCounter(monkeypatch)
    out = tmp_path / "out"
    dedupe = change.get("dedupe", True)
    first = run(make_recipe(corpus_root, dedupe=dedupe), out)
    assert reads.take() == first.parts_total > 3
    assert first.parts_reused == 0
    changed = make_recipe(corpus_root, **change)
    second = run(changed, out)
    assert reads.take() == 0
    assert second.parts_reused == second.parts_total == first.parts_total
    assert f"parts reused from cache: {second.parts_total}/{second.parts_total}" in "\n".join(second.summary_lines())
    assert second.fingerprint != first.fingerprint  # the change did reach the output
    fresh = run(changed, tmp_path / "fresh")
    assert reads.take() == fresh.parts_total
    assert dataset_files(out) == dataset_files(tmp_path / "fresh")


def test_cache_not_reused_when_cleaning_changes(
    corpus_root: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Adding a cleaning step invalidates every cached part: each is read again."""
    reads = ReadCounter(monkeypatch)
    out = tmp_path / "out"
    first = run(make_recipe(corpus_root), out)
    assert reads.take() == first.parts_total
    second = run(make_recipe(corpus_root, clean='[[clean]]\nkind = "lowercase"'), out)
    assert reads.take() == second.parts_total == first.parts_total
    assert second.parts_reused == 0
    assert f"parts reused from cache: 0/{second.parts_total}" in "\n".join(second.summary_lines())
    lowered = dataset_files(out)["vocab.arrow"]
    assert b"Harbor" not in lowered and b"harbor" in lowered  # the new step was applied


def test_force_rereads_everything(corpus_root: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """force=True ignores the cache, reads every part again and writes the same dataset."""
    reads = ReadCounter(monkeypatch)
    out = tmp_path / "out"
    recipe = make_recipe(corpus_root)
    first = run(recipe, out)
    before = dataset_files(out)
    assert reads.take() == first.parts_total
    again = run(recipe, out)
    assert reads.take() == 0 and again.parts_reused == again.parts_total
    forced = run(recipe, out, force=True)
    assert reads.take() == forced.parts_total
    assert forced.parts_reused == 0
    assert dataset_files(out) == before


def test_identical_input_files_are_each_counted_once(tmp_path: Path) -> None:
    """Two byte-identical inputs share their cached parts (same content key); without dedupe
    each still counts once: every count is twice the one-file count (common practice: a corpus
    holding a text twice counts it twice)."""
    root = tmp_path / "src"
    write_corpus(root, files=1)
    one_file = run(make_recipe(root, dedupe=False, train=1.0, validation=0.0, test=0.0), tmp_path / "one")
    (root / "corpus" / "log-01.txt").write_bytes((root / "corpus" / "log-00.txt").read_bytes())
    recipe = make_recipe(root, dedupe=False, train=1.0, validation=0.0, test=0.0)
    two_files = run(recipe, tmp_path / "two")
    from seqpipe.vocab import Vocabulary

    def counts(result: BuildResult) -> dict[bytes, int]:
        v = Vocabulary.load(result.directory / "vocab.arrow")
        return {v.token(i): int(c) for i, c in enumerate(v.counts) if i >= v.n_reserved}

    single = counts(one_file)
    assert counts(two_files) == {k: 2 * c for k, c in single.items()}
    assert two_files.parts_total == 2 * one_file.parts_total
    two_workers = build(recipe, tmp_path / "two-workers", workers=2, progress=False, part_bytes=SMALL_PARTS)
    assert dataset_files(two_workers.directory) == dataset_files(two_files.directory)
