"""Reusing another dataset's vocabulary; fixed splits per source and cross-split overlap."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
import xxhash

from seqpipe import build
from seqpipe._verify import verify
from seqpipe.dataset import Dataset, open_dataset
from seqpipe.errors import RecipeError
from seqpipe.recipe import parse_recipe

BASE = """
[dataset]
name = "base"
[[sources]]
kind = "text"
paths = "base/*.txt"
document = "paragraph"
[tokenizer]
kind = "{kind}"
[vocabulary]
cap = {cap}
[splits]
train = 0.8
validation = 0.1
test = 0.1
"""

ADDED = """
[dataset]
name = "added"
[[sources]]
kind = "text"
paths = "added/*.txt"
document = "paragraph"
[[clean]]
kind = "lowercase"
[tokenizer]
kind = "{kind}"
[vocabulary]
cap = {cap}
reuse_from = "out/base"
"""

SHARED = "the ferry left the north dock at dawn with cargo and a lantern"


def _corpus(root: Path) -> None:
    (root / "base").mkdir(parents=True)
    (root / "added").mkdir(parents=True)
    words = [
        *["ferry", "tide", "dock", "cargo", "lantern", "rope", "harbour"],
        *["fog", "north", "south", "calm", "squall", "pilot", "ledger", "the", "at"],
    ]
    rnd = np.random.default_rng(5)
    paras = [" ".join(rnd.choice(words, size=12)) for _ in range(60)]
    (root / "base" / "a.txt").write_text("\n\n".join([SHARED, *paras]) + "\n", encoding="utf-8")
    added = [" ".join(rnd.choice([*words, "gangway", "bollard"], size=9)) for _ in range(20)]
    (root / "added" / "b.txt").write_text("\n\n".join([SHARED, *added]) + "\n", encoding="utf-8")


def _build(root: Path, text: str, name: str) -> Path:
    out = root / "out" / name
    build(parse_recipe(text, root), out, workers=1, progress=False)
    return out


@pytest.mark.parametrize(("kind", "cap"), [("words", 0), ("bpe", 300)])
def test_reused_vocabulary_gives_the_same_ids(tmp_path: Path, kind: str, cap: int) -> None:
    """A dataset reusing a vocabulary encodes a shared document to the source's ids: the same tokens
    and reserved flags row by row (the count column is each dataset's own train counts)."""
    _corpus(tmp_path)
    base = _build(tmp_path, BASE.format(kind=kind, cap=cap), "base")
    added = _build(tmp_path, ADDED.format(kind=kind, cap=cap), "added")
    a, b = open_dataset(base), open_dataset(added)
    mine, theirs = (pa.ipc.open_file(str(d / "vocab.arrow")).read_all() for d in (added, base))
    assert mine.drop_columns(["count"]).equals(theirs.drop_columns(["count"]))
    assert a.encoder.encode(SHARED).tolist() == b.encoder.encode(SHARED).tolist()
    assert b.manifest["vocabulary"]["fingerprint"] == a.manifest["vocabulary"]["fingerprint"]
    assert b.manifest["vocabulary"]["reused_from"]["fingerprint"] == a.fingerprint
    assert "reused_from" not in a.manifest["vocabulary"]
    assert verify(added).ok


def test_reused_vocabulary_encodes_the_shared_document_identically(tmp_path: Path) -> None:
    """The shared document's stored ids in the added dataset equal its ids in the base dataset."""
    _corpus(tmp_path)
    base = open_dataset(_build(tmp_path, BASE.format(kind="words", cap=0), "base"))
    added = open_dataset(_build(tmp_path, ADDED.format(kind="words", cap=0), "added"))

    def stored(ds: Dataset, text: str) -> list[int]:
        digest = xxhash.xxh3_128_digest(text.encode("utf-8"))
        for name in ds.splits:
            split = ds.split(name)
            docs = split.documents.to_pydict()
            for start, length, h in zip(docs["start"], docs["length"], docs["hash"], strict=True):
                if h == digest:
                    return np.asarray(split.stream.slice(start, start + length)).tolist()
        raise AssertionError("shared document not found")

    assert stored(added, SHARED) == stored(base, SHARED)
    unknown = sum(v["unknown"] for v in added.manifest["summary"]["splits"].values())
    assert unknown > 0  # gangway and bollard are outside the base vocabulary


def test_different_vocabulary_has_a_different_fingerprint(tmp_path: Path) -> None:
    """Two datasets with different vocabularies carry different vocabulary fingerprints."""
    _corpus(tmp_path)
    words = open_dataset(_build(tmp_path, BASE.format(kind="words", cap=0), "base"))
    chars = open_dataset(_build(tmp_path, BASE.format(kind="chars", cap=0).replace('"base"', '"base2"', 1), "base2"))
    assert words.manifest["vocabulary"]["fingerprint"] != chars.manifest["vocabulary"]["fingerprint"]


@pytest.mark.parametrize(
    ("edit", "key", "mine", "theirs"),
    [
        (('kind = "words"', 'kind = "chars"'), "tokenizer.kind", "'chars'", "'words'"),
        (("cap = 0\n", "cap = 30\n"), "vocabulary.cap", "30", "0"),
        (("cap = 0\n", "cap = 0\nmin_count = 2\n"), "vocabulary.min_count", "2", "1"),
        (("cap = 0\n", 'cap = 0\nunknown = ""\n'), "vocabulary.unknown", "''", "'<unk>'"),
    ],
)
def test_contradicting_settings_are_refused(
    tmp_path: Path, edit: tuple[str, str], key: str, mine: str, theirs: str
) -> None:
    """A reusing recipe whose tokenizer or vocabulary settings differ is refused naming both values."""
    _corpus(tmp_path)
    _build(tmp_path, BASE.format(kind="words", cap=0), "base")
    text = ADDED.format(kind="words", cap=0).replace(*edit)
    with pytest.raises(RecipeError) as err:
        _build(tmp_path, text, "added")
    assert err.value.key.endswith(key)
    assert mine in str(err.value) and theirs in str(err.value)


def test_missing_source_dataset_is_a_recipe_error(tmp_path: Path) -> None:
    """reuse_from naming no dataset is refused with the key and the path it tried."""
    _corpus(tmp_path)
    with pytest.raises(RecipeError, match=r"reuse_from.*out/base"):
        _build(tmp_path, ADDED.format(kind="words", cap=0), "added")


FIXED = """
[[sources]]
kind = "text"
paths = "base/*.txt"
document = "paragraph"
[[sources]]
kind = "text"
paths = "held/*.txt"
document = "paragraph"
fixed_split = "{split}"
[splits]
train = 0.8
validation = 0.1
test = 0.1
exclude_overlap_from_train = {exclude}
"""


def _held(root: Path, extra: list[str]) -> list[str]:
    rnd = np.random.default_rng(9)
    held = [" ".join(rnd.choice(["gangway", "bollard", "wharf", "buoy", "stern"], size=7)) for _ in range(15)]
    (root / "held").mkdir(parents=True)
    (root / "held" / "h.txt").write_text("\n\n".join([*held, *extra]) + "\n", encoding="utf-8")
    return [*held, *extra]


def _hashes(ds: Dataset, split: str) -> set[bytes]:
    return set(ds.split(split).documents.column("hash").to_pylist())


@pytest.mark.parametrize("split", ["validation", "test", "train"])
def test_fixed_split_source_lands_entirely_in_its_split(tmp_path: Path, split: str) -> None:
    """Every document of a source with fixed_split is in that split, none elsewhere."""
    _corpus(tmp_path)
    held = {xxhash.xxh3_128_digest(t.encode()) for t in _held(tmp_path, [])}
    ds = open_dataset(_build(tmp_path, FIXED.format(split=split, exclude="false"), "fixed"))
    assert held <= _hashes(ds, split)
    for other in ds.splits:
        if other != split:
            assert not held & _hashes(ds, other)
    base_hashes = set().union(*(_hashes(ds, s) for s in ds.splits)) - held
    assert base_hashes  # the hash-assigned source still fills the splits


def test_overlap_with_train_is_counted_and_kept_by_default(tmp_path: Path) -> None:
    """A held-out document whose text is also a train document is counted, and train keeps it."""
    _corpus(tmp_path)
    # the base corpus's first paragraph: find one that hashes into train
    base = open_dataset(_build(tmp_path, BASE.format(kind="words", cap=0), "base"))
    paras = (tmp_path / "base" / "a.txt").read_text(encoding="utf-8").strip().split("\n\n")
    train = _hashes(base, "train")
    in_train = [p for p in paras if xxhash.xxh3_128_digest(p.encode()) in train][:2]
    assert len(in_train) == 2
    _held(tmp_path, in_train)
    ds = open_dataset(_build(tmp_path, FIXED.format(split="validation", exclude="false"), "fixed"))
    assert ds.manifest["summary"]["train_overlap"] == {"documents": len(in_train), "removed": 0}
    shared = {xxhash.xxh3_128_digest(p.encode()) for p in in_train}
    assert shared <= _hashes(ds, "train") and shared <= _hashes(ds, "validation")


def test_overlap_is_removed_from_train_only_with_the_option(tmp_path: Path) -> None:
    """With exclude_overlap_from_train the overlapping documents leave train and stay in validation."""
    _corpus(tmp_path)
    base = open_dataset(_build(tmp_path, BASE.format(kind="words", cap=0), "base"))
    paras = (tmp_path / "base" / "a.txt").read_text(encoding="utf-8").strip().split("\n\n")
    train = _hashes(base, "train")
    in_train = [p for p in paras if xxhash.xxh3_128_digest(p.encode()) in train][:2]
    assert len(in_train) == 2
    _held(tmp_path, in_train)
    ds = open_dataset(_build(tmp_path, FIXED.format(split="validation", exclude="true"), "fixed"))
    assert ds.manifest["summary"]["train_overlap"] == {"documents": len(in_train), "removed": len(in_train)}
    shared = {xxhash.xxh3_128_digest(p.encode()) for p in in_train}
    assert not shared & _hashes(ds, "train")
    assert shared <= _hashes(ds, "validation")
    assert ds.split("train").num_documents == base.split("train").num_documents - len(in_train)
    assert verify(tmp_path / "out" / "fixed").ok


def test_inspect_shows_both_datasets_cleaning_steps(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """inspect of a reusing dataset names the reused dataset and both lists of cleaning steps."""
    from seqpipe.cli import main

    _corpus(tmp_path)
    base = open_dataset(_build(tmp_path, BASE.format(kind="words", cap=0), "base"))
    added = _build(tmp_path, ADDED.format(kind="words", cap=0), "added")
    capsys.readouterr()
    assert main(["inspect", str(added)]) == 0
    out = capsys.readouterr().out
    assert f"reused from  out/base (dataset fingerprint {base.fingerprint})" in out
    assert "clean        lowercase" in out
    assert "clean there  (none)" in out
