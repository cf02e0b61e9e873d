"""The hash-partitioned drop phases (seqpipe/_dedupe.py) remove exactly the documents the
whole-corpus functions remove: counts.first_occurrence, clean.near_dedupe.near_duplicate_keep
and the held-out overlap check, for any split of the corpus into parts and partitions."""

from __future__ import annotations

import itertools
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqpipe import _dedupe
from seqpipe._build import Context, Kept, _dropped
from seqpipe._dedupe import Scheme, keep_mask, partitions_for, reset
from seqpipe.clean.near_dedupe import near_duplicate_keep
from seqpipe.counts import first_occurrence
from seqpipe.executors import InlineExecutor, TaskPool
from seqpipe.ingest import signature_rows
from seqpipe.recipe import SplitSpec
from seqpipe.splits import assign_splits


def fixed_binary(rows: np.ndarray) -> pa.Array:
    n, width = rows.shape
    return pa.FixedSizeBinaryArray.from_buffers(pa.binary(width), n, [None, pa.py_buffer(rows.tobytes())])


def random_corpus(seed: int, hashes: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Content hashes, dedupe keys and signatures with many exact and near repeats: documents
    are drawn from a small pool, and some signatures differ from their pool entry in a few values."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(0, 120))
    pool = int(rng.integers(1, 30))
    base = rng.integers(0, 4, size=(pool, hashes), dtype=np.uint32)
    pick = rng.integers(0, pool, size=n)
    sig = base[pick].copy()
    changed = rng.random((n, hashes)) < rng.choice([0.0, 0.1, 0.3])
    sig[changed] = rng.integers(0, 4, size=int(changed.sum()), dtype=np.uint32)
    content = np.zeros((n, 16), np.uint8)
    content[:, 0] = rng.integers(0, pool + 5, size=n)  # many equal contents, also across parts
    dedupe = content.copy()
    dedupe[:, 1] = rng.integers(0, 2, size=n)  # the dedupe key differs from the content hash sometimes
    return content, dedupe, sig


def cut(n: int, rng: np.random.Generator) -> list[int]:
    """Random part boundaries (empty parts allowed)."""
    parts = int(rng.integers(1, 6))
    return [0, *sorted(rng.integers(0, n + 1, size=parts - 1).tolist()), n]


def part_tables(content: np.ndarray, dedupe: np.ndarray, sig: np.ndarray, bounds: list[int]) -> dict[str, pa.Table]:
    """One part table per pair of ``bounds``: content hash, dedupe key and signature bytes per document."""
    width = 4 * sig.shape[1]
    return {
        f"k{i}": pa.table(
            {
                "hash": fixed_binary(content[a:b]),
                "dedupe": fixed_binary(dedupe[a:b]),
                "near": fixed_binary(sig[a:b].astype("<u4").view(np.uint8).reshape(b - a, width)),
            }
        )
        for i, (a, b) in enumerate(itertools.pairwise(bounds))
    }


def whole_corpus(
    content: np.ndarray,
    dedupe: np.ndarray,
    sig: np.ndarray,
    near: tuple[int, int, float],
    fixed: list[int | None],
    bounds: list[int],
    splits: SplitSpec,
) -> tuple[np.ndarray, int, int, int]:
    """The reference: keep mask, exact and near drops, overlap, computed over the whole corpus
    as the driver did before the partitioned phases (the overlap loop as in the old held_out)."""
    exact = first_occurrence(dedupe)
    keep = exact & near_duplicate_keep(sig, *near)
    part_of = np.repeat(np.arange(len(bounds) - 1), np.diff(bounds))
    held_rows = np.isin(part_of, [i for i, f in enumerate(fixed) if (f or 0) > 0])
    held = np.unique(content[held_rows & keep].view("V16").reshape(-1))
    overlap = 0
    for i in range(len(bounds) - 1):
        if (fixed[i] or 0) > 0:
            continue
        a, b = bounds[i], bounds[i + 1]
        train = assign_splits(splits, content[a:b], keep[a:b], fixed[i]) == 0
        hit = train & np.isin(content[a:b].view("V16").reshape(-1), held)
        overlap += int(hit.sum())
        if splits.exclude_overlap_from_train:
            keep[a:b] &= ~hit
    duplicates = int((~exact).sum())
    return keep, duplicates, int((~(exact & near_duplicate_keep(sig, *near))).sum()) - duplicates, overlap


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 2**32 - 1), st.sampled_from([(4, 2, 0.5), (2, 3, 0.75), (8, 1, 1.0), (3, 2, 0.0)]))
def test_partitioned_drops_equal_the_whole_corpus_functions(
    tmp_path_factory: pytest.TempPathFactory, seed: int, near: tuple[int, int, float]
) -> None:
    """For random corpora, parts and partition counts, the per-part drop lists and the counts
    equal first_occurrence, near_duplicate_keep and the held-out overlap over the whole corpus."""
    rng = np.random.default_rng(seed)
    bands, rows, _ = near
    content, dedupe, sig = random_corpus(seed, bands * rows)
    bounds = cut(len(content), rng)
    fixed: list[int | None] = [rng.choice(np.array([None, None, 0, 1, 2], dtype=object)) for _ in bounds[1:]]
    splits = SplitSpec(0.6, 0.2, 0.2, seed=seed % 7, exclude_overlap_from_train=bool(rng.integers(0, 2)))
    tables = part_tables(content, dedupe, sig, bounds)
    want_keep, want_dup, want_near, want_overlap = whole_corpus(content, dedupe, sig, near, fixed, bounds, splits)
    work = tmp_path_factory.mktemp("drops")
    kept = run_phases(work, tables, fixed, splits, near, partitions=int(rng.integers(1, 5)))
    got = np.concatenate(
        [keep_mask(kept.files[i], i, kept.documents[i]) for i in range(len(tables))] or [np.zeros(0, bool)]
    )
    assert got.tolist() == want_keep.tolist()
    assert (kept.duplicates, kept.near_duplicates, kept.overlap) == (want_dup, want_near, want_overlap)


def run_phases(
    work: Path,
    tables: dict[str, pa.Table],
    fixed: list[int | None],
    splits: SplitSpec,
    near: tuple[int, int, float],
    partitions: int,
) -> Kept:
    """_build._dropped over in-memory part tables (read_part_docs and _part_signatures replaced), on one process."""
    keys = list(tables)
    recipe = SimpleNamespace(
        sources=[
            SimpleNamespace(fixed_split=["train", "validation", "test"][f] if f is not None else "") for f in fixed
        ],
        splits=splits,
    )
    plan: Any = SimpleNamespace(tasks=[SimpleNamespace(key=k, source_index=i) for i, k in enumerate(keys)])
    ctx = Context(recipe, TaskPool(InlineExecutor()), work, show=False)  # type: ignore[arg-type]
    held = any((f or 0) > 0 for f in fixed)
    scheme = Scheme(str(work), str(work / "w"), len(keys), partitions, True, near, splits if held else None)
    reset(scheme.work_dir, keys)
    original = _dedupe.read_part_docs, _dedupe._part_signatures
    _dedupe.read_part_docs = lambda _cache, key: tables[key]  # type: ignore[assignment]
    _dedupe._part_signatures = lambda _cache, key, hashes: signature_rows(tables[key], hashes)  # type: ignore[assignment]
    try:
        return _dropped(ctx, plan, scheme, tuple(t.num_rows for t in tables.values()))
    finally:
        _dedupe.read_part_docs, _dedupe._part_signatures = original  # type: ignore[assignment]


def test_partition_count_grows_with_rows_only() -> None:
    """The partition count depends on documents and keys per document, never below 1 or above the cap."""
    assert partitions_for(0, 0) == 1
    assert partitions_for(_dedupe.ROWS_PER_PARTITION, 1) == 1
    assert partitions_for(_dedupe.ROWS_PER_PARTITION + 1, 1) == 2
    assert partitions_for(10**12, 16) == _dedupe.MAX_PARTITIONS


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**32 - 1), st.sampled_from([(4, 2, 0.5), (2, 3, 0.75), (3, 2, 0.0)]))
def test_partitioned_near_drops_hold_when_band_keys_collide(
    tmp_path_factory: pytest.TempPathFactory, seed: int, near: tuple[int, int, float]
) -> None:
    """With band keys that collide (a key that keeps only a band's first value), the group tasks
    still group by the band's values: the drops equal near_duplicate_keep over the whole corpus."""
    rng = np.random.default_rng(seed)
    bands, rows, _ = near
    content, dedupe, sig = random_corpus(seed, bands * rows)
    bounds = cut(len(content), rng)
    fixed: list[int | None] = [None] * (len(bounds) - 1)
    splits = SplitSpec(1.0, 0.0, 0.0)
    tables = part_tables(content, dedupe, sig, bounds)
    want_keep = whole_corpus(content, dedupe, sig, near, fixed, bounds, splits)[0]
    original = _dedupe.band_keys

    def colliding(s: np.ndarray, b: int, r: int) -> np.ndarray:
        return np.ascontiguousarray(s.reshape(len(s), b, r)[:, :, 0].T).astype(np.uint64).ravel()

    _dedupe.band_keys = colliding  # type: ignore[assignment]
    try:
        kept = run_phases(tmp_path_factory.mktemp("collide"), tables, fixed, splits, near, int(rng.integers(1, 4)))
    finally:
        _dedupe.band_keys = original  # type: ignore[assignment]
    got = np.concatenate(
        [keep_mask(kept.files[i], i, kept.documents[i]) for i in range(len(tables))] or [np.zeros(0, bool)]
    )
    assert got.tolist() == want_keep.tolist()
