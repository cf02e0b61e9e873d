"""Train/evaluation leakage (seqpipe.report.leakage)."""

from __future__ import annotations

import pyarrow as pa
from hypothesis import given, settings
from hypothesis import strategies as st
from memory_dataset import dataset_from_documents

from seqpipe.report import corpus_report
from seqpipe.vocab import VocabSpec


def words(text: str) -> list[str]:
    """Whitespace-separated tokens of ``text``."""
    return text.split()


TRAIN = ["the cat sat on the mat", "the dog sat on the log", "the cat saw the dog"]


def test_planted_duplicate_document_is_reported() -> None:
    """A validation document equal to a train document is found, with its example and train index;
    a test split without one reports none."""
    docs = {
        "train": [s.split() for s in TRAIN],
        "validation": [words("a new line here"), words("the dog sat on the log")],
        "test": [words("the dog sat on the mat")],
    }
    report = corpus_report(dataset_from_documents(docs), ngram_n=3, progress=False)
    val = report["leakage"]["documents"]["validation"]
    assert (val["checked"], val["duplicated"], val["share"]) == (2, 1, 0.5)
    assert val["examples"] == [{"document": 1, "train_document": 1, "tokens": 6, "text": "the dog sat on the log"}]
    assert val["text_duplicated"] == 1
    test = report["leakage"]["documents"]["test"]
    assert (test["duplicated"], test["examples"], test["text_duplicated"]) == (0, [], 0)


def test_duplicate_ids_with_different_text_are_still_found() -> None:
    """Documents equal as id sequences (unknown words both map to <unk>) leak even when the text
    hash differs; the text hash check alone would miss them."""
    docs = {"train": [s.split() for s in TRAIN] + [["the", "zebra"]], "validation": [["the", "okapi"]]}
    # min_count=2 leaves "zebra" (seen once) out of the vocabulary, so it encodes as <unk> too
    ds = dataset_from_documents(docs, spec=VocabSpec(min_count=2))
    leak = corpus_report(ds, progress=False)["leakage"]["documents"]["validation"]
    assert leak["duplicated"] == 1 and leak["text_duplicated"] == 0


@st.composite
def splits(draw: st.DrawFn) -> dict[str, list[list[str]]]:
    words = [chr(ord("a") + i) for i in range(draw(st.integers(1, 4)))]
    doc = st.lists(st.sampled_from(words), max_size=10)
    return {"train": draw(st.lists(doc, min_size=1, max_size=5)), "test": draw(st.lists(doc, max_size=5))}


@settings(max_examples=100, deadline=None)
@given(splits(), st.integers(1, 6))
def test_shared_ngram_share_matches_sets_of_tuples(docs: dict, n: int) -> None:
    """The share of test n-gram windows seen in train equals the count by Python sets of id tuples."""
    ds = dataset_from_documents(docs)

    def ids(doc: list[str]) -> list[int]:
        return ds.vocabulary.lookup(pa.array([w.encode() for w in doc], pa.binary())).tolist() if doc else []

    train_windows = {tuple(ids(d)[i : i + n]) for d in docs["train"] for i in range(len(d) - n + 1)}
    test_windows = [tuple(ids(d)[i : i + n]) for d in docs["test"] for i in range(len(d) - n + 1)]
    got = corpus_report(ds, ngram_n=n, progress=False)["leakage"]["ngrams"]["test"]
    assert got["windows"] == len(test_windows)
    assert got["shared"] == sum(w in train_windows for w in test_windows)
