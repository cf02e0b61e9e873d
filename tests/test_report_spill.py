"""Counts spilled to disk in hash partitions (seqpipe.report.spill) give exactly the in-memory figures."""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from memory_dataset import dataset_from_documents

from seqpipe.errors import SeqpipeError
from seqpipe.report import corpus_report, lm, spill
from seqpipe.report.corpus import Roles, load_split
from seqpipe.report.ngrams import NgramCounts, key_bits, merge_counts, runs

WORDS = ["a", "b", "c", "d", "e", "f", "g"]
documents = st.lists(st.lists(st.sampled_from(WORDS), max_size=9), min_size=1, max_size=25)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(documents, documents, st.integers(1, 7), st.integers(1, 30))
def test_spilled_tables_equal_the_in_memory_tables(
    tmp_path: Path, train_docs: list[list[str]], other_docs: list[list[str]], partitions: int, size: int
) -> None:
    """Tables fitted from tiny partitions on disk give every evaluation event the same counts as the
    exact in-memory tables, hence the same perplexities (validation shares documents with train)."""
    ds = dataset_from_documents({"train": [*train_docs, ["a", "b"]], "validation": [*other_docs, *train_docs[:3]]})
    roles = Roles.of(ds.vocabulary)
    bits, n_ids, space = key_bits(roles.vocab_size), roles.vocab_size + 1, lm.event_space(roles)
    train, val = load_split(ds, "train", roles), load_split(ds, "validation", roles)
    exact = lm.CountTables.fit_chunks((lm.events(p, roles) for p in lm.chunks(train, size)), bits, n_ids)
    queries = lm.query_keys((lm.events(p, roles) for p in lm.chunks(val, size)), bits)
    with tempfile.TemporaryDirectory(dir=tmp_path) as work:  # one per example: hypothesis reuses tmp_path
        spilled = lm.CountTables.fit_spilled(
            (lm.events(p, roles) for p in lm.chunks(train, size)),
            queries,
            bits,
            n_ids,
            workdir=Path(work),
            partitions=partitions,
        )
    for field in ("n_events", "bigram_types", "uni_counts", "uni_left"):
        assert np.array_equal(getattr(exact, field), getattr(spilled, field)), field
    ev = lm.events(val, roles)
    want, got = lm.Lookups.of(exact, ev), lm.Lookups.of(spilled, ev)
    for field in lm.Lookups.__dataclass_fields__:
        assert np.array_equal(getattr(want, field), getattr(got, field)), field
    a = lm.evaluate(exact, ev, space=space, k=0.5, d=0.75)
    b = lm.evaluate(spilled, lm.events(val, roles), space=space, k=0.5, d=0.75)
    for model in lm.MODELS:
        assert b[model] == pytest.approx(a[model], rel=1e-12)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    st.lists(st.lists(st.integers(0, 30), max_size=40), min_size=1, max_size=6),
    st.integers(1, 9),
    st.integers(1, 12),
)
def test_top_of_spill_equals_most_common_of_the_merged_counts(
    tmp_path: Path, batches: list[list[int]], partitions: int, k: int
) -> None:
    """The top ``k`` keys counted partition by partition, ties in key order, equal the top ``k`` of
    the counts merged in memory (few distinct keys: many ties)."""
    keys, counts = np.zeros(0, np.uint64), np.zeros(0, np.int64)
    with tempfile.TemporaryDirectory(dir=tmp_path) as work:  # one per example: hypothesis reuses tmp_path
        table = spill.Spill(Path(work), "t", partitions)
        for batch in batches:
            new, new_c, _ = runs(np.sort(np.array(batch, dtype=np.uint64)))
            table.add(new, new_c, new)
            keys, counts = merge_counts(keys, counts, new, new_c)
        got_keys, got_counts = spill.top_of_spill(table, k)
    want_rows, want_counts = NgramCounts(n=1, bits=8, keys=keys, counts=counts).most_common(k)
    assert got_keys.tolist() == want_rows[:, 0].tolist()
    assert got_counts.tolist() == want_counts.tolist()


def test_rows_of_one_group_share_a_partition(tmp_path: Path) -> None:
    """Rows are placed by their group key: equal groups in one partition, every row kept once."""
    rng = np.random.default_rng(3)
    keys = rng.integers(0, 1 << 40, size=5000, dtype=np.uint64)
    group = keys >> np.uint64(20)
    table = spill.Spill(tmp_path, "g", 5)
    table.add(keys, np.ones(len(keys), np.int64), group)
    seen = [table.rows(p)[0] for p in range(5)]
    assert sorted(np.concatenate(seen).tolist()) == sorted(keys.tolist())
    owner = {int(g): p for p, part in enumerate(seen) for g in (part >> np.uint64(20)).tolist()}
    assert all(owner[int(g)] == p for p, part in enumerate(seen) for g in (part >> np.uint64(20)).tolist())
    assert min(len(s) for s in seen) > 0  # the hash spreads 5000 random keys over every partition


def test_partition_count_covers_the_rows() -> None:
    """About ``part_rows`` rows per partition, never fewer than one partition; a zero size is refused."""
    assert spill.partition_count(0, 10) == 1
    assert spill.partition_count(10, 10) == 1
    assert spill.partition_count(11, 10) == 2
    with pytest.raises(SeqpipeError):
        spill.partition_count(5, 0)


def test_report_with_tiny_partitions_equals_the_default(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The whole report does not depend on the partition size or the evaluation slice, and leaves no
    temporary file behind."""
    rng = np.random.default_rng(11)
    docs = {
        name: [[WORDS[i] for i in rng.integers(0, len(WORDS), size=rng.integers(0, 12))] for _ in range(n)]
        for name, n in (("train", 60), ("validation", 15), ("test", 15))
    }
    ds = dataset_from_documents(docs)
    monkeypatch.setattr("tempfile.tempdir", str(tmp_path))
    default = corpus_report(ds, progress=False, top_k=5)
    monkeypatch.setattr(spill, "PART_ROWS", 7)
    monkeypatch.setattr(lm, "EVAL_EVENTS", 5)
    tiny = corpus_report(ds, progress=False, top_k=5)
    assert tiny["top_ngrams"] == default["top_ngrams"]
    assert tiny["perplexity"]["train_events"] == default["perplexity"]["train_events"]
    for name in ("validation", "test"):
        want, got = default["perplexity"]["splits"][name], tiny["perplexity"]["splits"][name]
        assert got["events"] == want["events"] > 5
        for model in lm.MODELS:
            assert got[model] == pytest.approx(want[model], rel=1e-12)
    assert list(tmp_path.iterdir()) == []
