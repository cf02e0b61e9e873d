"""The shard phase's arithmetic: each split's shards cut from the encoded parts, its docs
table, and its manifest entry.

A split's tokens form one stream, the encoded parts' files one after another in corpus order;
shard k holds tokens ``[k * per_shard, (k + 1) * per_shard)`` of it. The documents table gives each
document's start in that stream, re-cut into fixed batches so its bytes depend on the content
only, never on how the inputs were cut into parts.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import numpy as np
import pyarrow as pa

from seqpipe._hashing import hash_file
from seqpipe.formats import DOCS_SCHEMA, docs_path, shard_path
from seqpipe.ingest import ShardTask, encoded_path, fragment_path, read_fragment
from seqpipe.recipe import SPLIT_NAMES, Recipe
from seqpipe.shards import write_batches

DOCS_BATCH_ROWS: Final = 1 << 16
# what encode_part reports per split and part, summed per split
TOTALS: Final = ("tokens", "content", "documents", "unknown", "bytes", "characters", "words")


@dataclass(frozen=True, slots=True)
class SplitLayout:
    """Where one split's tokens go: the encoded parts that hold some of it, in stream order,
    and one task per shard of ``per_shard`` tokens (the last one shorter)."""

    name: str
    parts: tuple[int, ...]
    totals: dict[str, int]  # TOTALS summed over the parts
    per_shard: int
    shards: tuple[ShardTask, ...]


@dataclass(frozen=True, slots=True)
class DocsTable:
    """A written documents table, and the number of documents starting in each shard of its split."""

    path: str
    size: int
    hash: str
    shard_documents: tuple[int, ...]


def lay_out(
    recipe: Recipe,
    encoded: Sequence[dict[str, dict[str, int]]],
    dtype: str,
    stage: Path,
    vocab_size: int | None = None,
) -> tuple[SplitLayout, ...]:
    """Each split's shards: ``shards.tokens`` tokens each, cut from the encoded parts; with
    ``vocab_size`` the train shards' tasks also count their ids (the vocabulary's ``count``)."""
    return tuple(
        _split_layout(recipe, split, encoded, dtype, stage, vocab_size if split == "train" else None)
        for split in SPLIT_NAMES
    )


def _split_layout(
    recipe: Recipe,
    split: str,
    encoded: Sequence[dict[str, dict[str, int]]],
    dtype: str,
    stage: Path,
    count_ids: int | None,
) -> SplitLayout:
    per_shard = recipe.shards.tokens
    compression = None if recipe.shards.compression == "none" else recipe.shards.compression
    held = [i for i, enc in enumerate(encoded) if split in enc]
    totals = {k: sum(encoded[i][split][k] for i in held) for k in TOTALS}
    sizes = np.array([encoded[i][split]["tokens"] for i in held], np.int64)
    ends = np.cumsum(sizes)
    starts = ends - sizes
    files = [str(encoded_path(str(stage), i, split)) for i in held]
    shards = []
    for k, first in enumerate(range(0, totals["tokens"], per_shard)):
        last = min(first + per_shard, totals["tokens"])
        # the files overlapping [first, last): those ending after first and starting before last
        lo, hi = int(np.searchsorted(ends, first, side="right")), int(np.searchsorted(starts, last, side="left"))
        pieces = tuple(
            (files[j], max(first, int(starts[j])) - int(starts[j]), min(last, int(ends[j])) - int(starts[j]))
            for j in range(lo, hi)
            if max(first, int(starts[j])) < min(last, int(ends[j]))
        )
        shards.append(ShardTask(str(stage / shard_path(split, k)), pieces, compression, dtype, count_ids))
    return SplitLayout(split, tuple(held), totals, per_shard, tuple(shards))


def write_docs_tables(stage: Path, layouts: Sequence[SplitLayout]) -> tuple[DocsTable, ...]:
    """The documents tables, streamed fragment by fragment; counts the documents starting in each
    shard. Written without fsync: the build syncs its whole stage before publishing it."""
    out = []
    for layout in layouts:
        rel = docs_path(layout.name)
        docs_in = np.zeros(len(layout.shards), np.int64)
        batches = _docs_batches(stage, layout.name, layout.parts, layout.per_shard, docs_in)
        size = write_batches(stage / rel, DOCS_SCHEMA, batches, durable=False)
        out.append(DocsTable(rel, size, hash_file(stage / rel), tuple(int(c) for c in docs_in)))
    return tuple(out)


def split_entry(layout: SplitLayout, docs: DocsTable, written: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """The manifest's entry for one split."""
    n_tokens = layout.totals["tokens"]
    shards = [
        {
            "path": shard_path(layout.name, k),
            "tokens": min(first + layout.per_shard, n_tokens) - first,
            "documents": docs.shard_documents[k],
            "first_token": first,
            "bytes": res["bytes"],
            "hash": res["file_hash"],
            "token_hash": res["token_hash"],
        }
        for k, (first, res) in enumerate(zip(range(0, n_tokens, layout.per_shard), written, strict=True))
    ]
    return {
        "documents": layout.totals["documents"],
        "tokens": n_tokens,
        "shards": shards,
        "document_table": {"path": docs.path, "bytes": docs.size, "hash": docs.hash},
    }


def split_summary(totals: dict[str, int]) -> dict[str, Any]:
    """The summary's figures for one split."""
    n_tokens = totals["tokens"]
    return {
        "unknown": totals["unknown"],
        # one definition, the report's too: unknown tokens per content token (begin/end markers,
        # which are never unknown, left out of the denominator)
        "unknown_rate": totals["unknown"] / totals["content"] if totals["content"] else 0.0,
        "bytes_per_token": totals["bytes"] / n_tokens if n_tokens else 0.0,
        "tokens_per_word": n_tokens / totals["words"] if totals["words"] else 0.0,
        "documents": totals["documents"],
        # UTF-8 bytes and code points of the cleaned documents: the report's bits per byte / character
        "bytes": totals["bytes"],
        "characters": totals["characters"],
    }


def _docs_batches(
    stage: Path, split: str, numbers: Sequence[int], per_shard: int, docs_in: np.ndarray
) -> Iterator[pa.RecordBatch]:
    """The split's documents with stream start offsets, re-cut into batches of DOCS_BATCH_ROWS
    rows so the file's layout depends on its content only (not on how inputs were split into
    parts); adds to ``docs_in`` the number of documents starting in each shard."""
    start = 0
    pending: list[pa.Table] = []
    rows = 0
    for i in numbers:
        frag = read_fragment(str(fragment_path(str(stage), i, split)))
        lengths = frag.column("length").to_numpy()
        starts = start + np.cumsum(lengths) - lengths
        start += int(lengths.sum())
        if len(starts):
            docs_in += np.bincount(starts // per_shard, minlength=len(docs_in))
        pending.append(
            pa.table(
                {
                    "start": pa.array(starts, pa.int64()),
                    "length": frag.column("length"),
                    "input": frag.column("input"),
                    "hash": frag.column("hash"),
                },
                schema=DOCS_SCHEMA,
            )
        )
        rows += len(lengths)
        while rows >= DOCS_BATCH_ROWS:
            table = pa.concat_tables(pending).combine_chunks()
            yield table.slice(0, DOCS_BATCH_ROWS).to_batches()[0]
            pending, rows = [table.slice(DOCS_BATCH_ROWS)], rows - DOCS_BATCH_ROWS
    if rows:
        yield pa.concat_tables(pending).combine_chunks().to_batches()[0]
