"""Near-copies across splits in the report's leakage section, and its chunked reading."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from memory_dataset import MemoryDataset, dataset_from_documents

from seqpipe.report import corpus, corpus_report, leakage, near
from seqpipe.report.lm import MODELS

# invented syllables for invented ferry-log words (not a reference)
_SYLLABLES = ("fer", "ry", "dock", "tide", "rope", "lan", "tern", "pil", "ot", "ledg", "er", "har", "bour", "mist")


def _words(count: int, seed: int) -> list[str]:
    rng = np.random.default_rng(seed)
    return ["".join(_SYLLABLES[int(i)] for i in rng.integers(0, len(_SYLLABLES), 3)) for _ in range(count)]


def _changed(doc: list[str], at: int) -> list[str]:
    return [*doc[:at], "squallmarker", *doc[at + 1 :]]


def _near_dataset(train_has_both: bool) -> tuple[MemoryDataset, list[list[str]]]:
    """Train of unrelated 120-word documents; validation holds one-word-changed copies of train 0 and 3
    and two unrelated documents. With ``train_has_both`` train also keeps a near-copy of its document 0
    (as a build without near-duplicate removal would)."""
    train = [_words(120, seed) for seed in range(8)]
    if train_has_both:
        train.append(_changed(train[0], 90))
    validation = [_changed(train[0], 40), _words(120, 100), _changed(train[3], 7), _words(120, 101)]
    return dataset_from_documents({"train": train, "validation": validation}), validation


def test_planted_near_copies_are_found_and_unrelated_documents_are_not() -> None:
    """Validation documents with one word changed from a train document are near-copies (with the
    train document's index and a similarity at or above the threshold); unrelated ones are not."""
    ds, _ = _near_dataset(train_has_both=False)
    found = corpus_report(ds, ngram_n=4, progress=False)["leakage"]["near_copies"]
    assert found["parameters"]["from"] == "defaults"
    entry = found["splits"]["validation"]
    assert (entry["checked"], entry["near_copies"], entry["share"]) == (4, 2, 0.5)
    pairs = {(e["document"], e["train_document"]) for e in entry["examples"]}
    assert pairs == {(0, 0), (2, 3)}
    assert all(found["parameters"]["threshold"] <= e["similarity"] < 1.0 for e in entry["examples"])


def test_share_is_the_same_whether_or_not_train_kept_its_own_near_copies() -> None:
    """Removing a near-duplicate from train (as near_dedupe in the build would) does not change the
    share of validation documents with a near-copy in train."""
    with_both = corpus_report(_near_dataset(True)[0], ngram_n=4, progress=False)
    without = corpus_report(_near_dataset(False)[0], ngram_n=4, progress=False)
    a = with_both["leakage"]["near_copies"]["splits"]["validation"]
    b = without["leakage"]["near_copies"]["splits"]["validation"]
    assert (a["near_copies"], a["share"]) == (b["near_copies"], b["share"]) == (2, 0.5)


def test_recipe_parameters_of_near_dedupe_are_used() -> None:
    """A manifest whose recipe has a near_dedupe step gives the report that step's parameters: a
    threshold of 1.0 finds no copy that differs in one word."""
    ds, _ = _near_dataset(False)
    step = {"kind": "near_dedupe", "shingle": 5, "bands": 16, "rows": 8, "threshold": 1.0, "seed": 0}
    strict = MemoryDataset(ds.vocabulary, ds.encoder, ds.parts, ds.fingerprint, {"recipe": {"clean": [step]}})
    found = corpus_report(strict, ngram_n=4, progress=False)["leakage"]["near_copies"]
    assert found["parameters"]["from"] == "recipe"
    assert found["parameters"]["threshold"] == 1.0
    assert found["splits"]["validation"]["near_copies"] == 0


def test_markdown_shows_near_copies(tmp_path: Path) -> None:
    """The Markdown report has the near-copy table and names the example pair."""
    from seqpipe.report import write_dataset_report

    write_dataset_report(_near_dataset(False)[0], tmp_path, ngram_n=4, progress=False)
    text = (tmp_path / "report.md").read_text(encoding="utf-8")
    assert "near-copy in train" in text
    assert "document 2 ~ train document 3" in text


def _figures(report: dict[str, object]) -> str:
    return json.dumps(report, sort_keys=True)


def test_report_does_not_depend_on_the_chunk_size(monkeypatch: pytest.MonkeyPatch) -> None:
    """Read in groups of a few documents (and near-copy signatures made a few documents at a time),
    every figure of the report equals the one-group report (perplexities to float rounding: they are
    sums over groups)."""
    train = [_words(int(20 + 7 * (s % 5)), s) for s in range(40)]
    other = [_words(25, 200 + s) for s in range(6)] + [train[5], _changed(train[9], 3)]
    ds = dataset_from_documents({"train": train, "validation": other, "test": other[::-1]})
    whole = corpus_report(ds, ngram_n=3, progress=False)
    monkeypatch.setitem(corpus.read_chunks.__kwdefaults__, "size", 60)
    monkeypatch.setattr(near, "BATCH_TOKENS", 40)
    pieces = corpus_report(ds, ngram_n=3, progress=False)
    ppl_whole, ppl_pieces = whole.pop("perplexity"), pieces.pop("perplexity")
    assert _figures(whole) == _figures(pieces)
    for name, entry in ppl_whole["splits"].items():
        assert ppl_pieces["splits"][name]["events"] == entry["events"]
        for model in MODELS:
            assert ppl_pieces["splits"][name][model] == pytest.approx(entry[model], rel=1e-12)
    assert whole["leakage"]["documents"]["validation"]["duplicated"] == 1


def test_sampled_window_set_estimates_the_shared_share_and_says_so() -> None:
    """With a window set capped below the train split's distinct windows, the shared share is
    estimated on a hash range (every > 1), stated with its standard error, and lies within four
    standard errors of the exact share."""
    ds = dataset_from_documents(
        {"train": [_words(300, s) for s in range(30)], "validation": [_words(300, 5), _words(300, 500)]}
    )
    roles = corpus.Roles.of(ds.vocabulary)
    exact = leakage.WindowSet.of(corpus.read_chunks(ds, "train", roles), 3)
    capped = leakage.WindowSet.of(corpus.read_chunks(ds, "train", roles), 3, cap=len(exact.keys) // 6)
    assert exact.every == 1 and capped.every >= 8 and len(capped.keys) <= len(exact.keys) // 6
    full = leakage.shared_ngrams_chunked(exact, corpus.read_chunks(ds, "validation", roles), 3)
    est = leakage.shared_ngrams_chunked(capped, corpus.read_chunks(ds, "validation", roles), 3)
    assert "sample" not in full and est["sample"]["every"] == capped.every
    assert est["windows"] == full["windows"]
    assert abs(est["share"] - full["share"]) <= 4 * est["sample"]["standard_error"] + 1e-9


def test_band_keys_are_equal_exactly_when_a_band_is() -> None:
    """Two signatures get the same key for a band iff they agree on all of that band's values."""
    rng = np.random.default_rng(3)
    sig = rng.integers(0, 2**32, size=(2, 32), dtype=np.uint64).astype(np.uint32)
    sig[1, :8] = sig[0, :8]  # band 0 agrees, bands 1-3 do not
    keys = near.band_keys(sig, 4, 8)
    assert keys[0, 0] == keys[1, 0]
    assert (keys[0, 1:] != keys[1, 1:]).all()
