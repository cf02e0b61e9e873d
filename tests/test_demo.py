"""The demo corpus: deterministic, readable by its own recipe, and varied on purpose."""

from __future__ import annotations

import gzip
import tomllib
import unicodedata
from pathlib import Path

import pytest

from seqpipe.clean import parse_step
from seqpipe.demo import demo_recipe_text, write_demo_corpus
from seqpipe.errors import RecipeError
from seqpipe.sources import ReadStats, parse_source


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def _documents(root: Path) -> list[str]:
    recipe = tomllib.loads(demo_recipe_text())
    docs: list[str] = []
    for i, table in enumerate(recipe["sources"]):
        for array in parse_source(table, f"recipe.sources[{i}]").documents(root, ReadStats()):
            docs.extend(array.to_pylist())
    return docs


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("demo")
    write_demo_corpus(root)
    return root


def test_same_seed_gives_identical_bytes(corpus: Path, tmp_path: Path) -> None:
    """Writing again with the same seed reproduces every file byte for byte (gzip included)."""
    write_demo_corpus(tmp_path)
    assert _files(tmp_path) == _files(corpus)


def test_other_seed_gives_other_text(corpus: Path, tmp_path: Path) -> None:
    """A different seed changes every file's content but not the layout."""
    write_demo_corpus(tmp_path, seed=8)
    other, base = _files(tmp_path), _files(corpus)
    assert other.keys() == base.keys()
    assert all(other[name] != base[name] for name in base)


def test_layout_and_size(corpus: Path, tmp_path: Path) -> None:
    """Several files in three formats, a few MB in all; the list returned is sorted and complete."""
    files = _files(corpus)
    assert sorted(files) == [p.relative_to(tmp_path).as_posix() for p in write_demo_corpus(tmp_path)]
    assert {n.split("/")[0] for n in files} == {"logs", "archive", "remarks"}
    assert sum(n.endswith(".txt") for n in files) >= 3
    gz = gzip.decompress(files["archive/old-ledger.txt.gz"])  # stdlib gzip reads it (reference reader)
    assert len(gz) > 100_000
    total = sum(len(b) for n, b in files.items() if not n.endswith(".gz")) + len(gz)
    assert 1_000_000 < total < 10_000_000


def test_recipe_reads_exactly_the_documents_written(corpus: Path) -> None:
    """The recipe's sources yield the requested number of documents; its tables parse."""
    assert len(_documents(corpus)) == 600
    recipe = tomllib.loads(demo_recipe_text())  # TOML 1.0 parser of the standard library
    assert recipe["dataset"]["name"] == "ferry-logs"
    for i, table in enumerate(recipe["clean"]):
        parse_step(table, f"recipe.clean[{i}]")


def test_small_corpus_keeps_every_format(tmp_path: Path) -> None:
    """A small document count still writes all three formats and exactly that many documents."""
    write_demo_corpus(tmp_path, documents=20, seed=3)
    assert len(_documents(tmp_path)) == 20
    with pytest.raises(RecipeError, match="documents"):
        write_demo_corpus(tmp_path / "x", documents=2)


def test_text_is_varied_on_purpose(corpus: Path) -> None:
    """Accents, CJK, emoji, some NFD-typed names, exact and near duplicates are all present."""
    docs = _documents(corpus)
    text = "".join(docs)
    assert any(unicodedata.category(c) == "Lo" and "CJK" in unicodedata.name(c, "") for c in text)
    assert any(ord(c) >= 0x1F300 for c in text)  # emoji block and above
    assert "é" in unicodedata.normalize("NFC", text)
    assert sum(d != unicodedata.normalize("NFC", d) for d in docs) >= 5
    assert len(set(docs)) < len(docs)  # exact duplicates
    # A near duplicate differs from its original in one word, so compare documents whose
    # second line (the first crossing or remark) is the same.
    groups: dict[str, list[set[str]]] = {}
    for d in docs:
        groups.setdefault(d.split("\n")[1], []).append(set(d.split(" ")))
    near = sum(1 for g in groups.values() for i, a in enumerate(g) for b in g[:i] if a != b and len(a ^ b) <= 2)
    assert near >= 3


def test_no_outside_text_markers(corpus: Path) -> None:
    """Every document is a ferry log entry or a remark page of the invented service."""
    for doc in _documents(corpus):
        assert doc.startswith(("Logbook of the ", "Remark book of the "))


def test_planted_contact_details_are_redacted(corpus: Path) -> None:
    """The demo's invented contact details all sit at example.* domains and the redact step finds each kind."""
    import re

    from seqpipe.clean.redact import redact_text

    docs = _documents(corpus)
    text = "\n".join(docs)
    domains = set(re.findall(r"@([a-z0-9.-]+[a-z0-9])", text))
    assert domains and all(d.endswith(".example") for d in domains)  # RFC 2606 reserved names
    _, counts = redact_text(text)
    assert all(counts[t] > 0 for t in ("email", "ip", "card", "phone")), counts


def test_demo_build_counts_planted_copies_and_redactions(corpus: Path, tmp_path: Path) -> None:
    """The demo recipe drops every planted exact and near copy and counts each redacted kind; the
    build summary shows both counts."""
    from seqpipe import build
    from seqpipe.demo import _EXACT_DUPLICATE_EVERY, _NEAR_DUPLICATE_EVERY
    from seqpipe.recipe import parse_recipe

    result = build(parse_recipe(demo_recipe_text(), corpus), tmp_path / "out", workers=1, progress=False)
    summary = result.manifest["summary"]
    # 600 documents: 420 logs, 90 archived logs, 90 remark pages; a copy every 40th / 97th entry
    sections = (420, 90, 90)
    near = sum(
        1 for n in sections for i in range(1, n) if i % _NEAR_DUPLICATE_EVERY == 0 and i % _EXACT_DUPLICATE_EVERY
    )
    exact = sum(1 for n in sections for i in range(1, n) if i % _EXACT_DUPLICATE_EVERY == 0)
    assert summary["near_duplicates_dropped"] >= near > 0
    assert summary["duplicates_dropped"] >= exact > 0
    assert all(summary["redacted"][t] > 0 for t in ("email", "ip", "card", "phone")), summary["redacted"]
    counted = next(line for line in result.summary_lines() if line.startswith("counted"))
    assert "near-duplicates dropped" in counted and "redacted email" in counted
