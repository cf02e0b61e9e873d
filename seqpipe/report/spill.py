"""Counted n-gram keys spilled to disk in hash partitions, so no table of every distinct n-gram
of a split is held in memory.

Rows are ``(key, count)`` pairs (packed keys, see :mod:`seqpipe.report.ngrams`). Each row goes to
the partition of a *group key* derived from its key (the key itself, or a prefix or suffix of it),
so every row of one group lands in one partition: a sum or a count of distinct keys per group
is then exact partition by partition. A partition is read back whole; its size is set by the
number of partitions, chosen from the expected number of rows (:func:`partition_count`).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from pathlib import Path
from typing import Final

import numpy as np

from seqpipe.errors import SeqpipeError
from seqpipe.report.ngrams import runs

RECORD: Final = np.dtype([("key", "<u8"), ("count", "<i8")])
# rows per partition: a partition's sort and run passes need some 50 bytes per row
PART_ROWS: Final = 1 << 20
# odd 64-bit multiplier (the golden ratio's fraction): its high product bits mix every key bit
_MIX: Final = np.uint64(0x9E3779B97F4A7C15)


def partition_count(rows: int, part_rows: int | None = None) -> int:
    """Partitions for about ``rows`` rows so that each holds about ``part_rows`` (default
    ``PART_ROWS``), at least one."""
    part_rows = PART_ROWS if part_rows is None else part_rows
    if part_rows < 1:
        raise SeqpipeError(f"rows per partition must be at least 1, got {part_rows}")
    return max(1, -(-rows // part_rows))


def partition_of(group: np.ndarray, parts: int) -> np.ndarray:
    """The partition (``0 .. parts - 1``) of each group key: a multiplicative hash's high half modulo ``parts``."""
    mixed = np.multiply(np.asarray(group, dtype=np.uint64), _MIX)  # wraps mod 2**64 by design
    mixed >>= np.uint64(32)
    mixed %= np.uint64(parts)
    return mixed


def by_partition(group: np.ndarray, parts: int) -> tuple[np.ndarray, np.ndarray]:
    """Row indexes ordered by partition (ascending within one) and the ``parts + 1`` edges of each
    partition's slice of them."""
    part = partition_of(group, parts)
    order = np.argsort(part, kind="stable")
    edges = np.searchsorted(part[order], np.arange(parts + 1, dtype=np.uint64))
    return order, edges


@dataclass(frozen=True, slots=True)
class Spill:
    """Partitioned ``(key, count)`` rows under ``directory``, one append-only file per partition."""

    directory: Path
    name: str
    parts: int

    def path(self, part: int) -> Path:
        return self.directory / f"{self.name}-{part:05d}.rows"

    def add(self, keys: np.ndarray, counts: np.ndarray, group: np.ndarray) -> None:
        """Append rows; row ``i`` goes to the partition of ``group[i]``."""
        order, edges = by_partition(group, self.parts)
        rows = np.empty(len(order), dtype=RECORD)
        rows["key"] = keys[order]
        rows["count"] = counts[order]
        del order
        for part, (a, b) in enumerate(itertools.pairwise(edges.tolist())):
            if a == b:
                continue
            try:
                with self.path(part).open("ab") as f:
                    rows[a:b].tofile(f)
            except OSError as exc:
                raise SeqpipeError(
                    f"{self.path(part)}: cannot write the report's temporary counts ({exc}); "
                    "free disk space there or point TMPDIR at a larger disk"
                ) from exc

    def rows(self, part: int) -> tuple[np.ndarray, np.ndarray]:
        """Keys and counts of every row of one partition, in the order written."""
        path = self.path(part)
        if not path.exists():
            return np.zeros(0, np.uint64), np.zeros(0, np.int64)
        try:
            rows = np.fromfile(path, dtype=RECORD)
        except OSError as exc:
            raise SeqpipeError(f"{path}: cannot read the report's temporary counts back ({exc})") from exc
        return rows["key"], rows["count"]  # strided views of the one read

    def totals(self, part: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """One partition's distinct keys (ascending), their summed counts, and how many rows had each."""
        keys, counts = self.rows(part)
        order = np.argsort(keys)
        keys = keys[order]
        counts = counts[order]
        del order
        distinct, n_rows, starts = runs(keys)
        sums = np.add.reduceat(counts, starts) if len(distinct) else counts
        return distinct, sums.astype(np.int64), n_rows.astype(np.int64)


def top_rows(keys: np.ndarray, counts: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``k`` rows of highest count, ties in ascending key order, in that order."""
    order = np.lexsort((keys, -counts))[:k]
    return keys[order], counts[order]


def top_of_spill(spill: Spill, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``k`` keys of highest summed count over every partition of ``spill`` (ties in key order):
    the top ``k`` of the whole is within the union of each partition's top ``k``."""
    best_keys, best_counts = np.zeros(0, np.uint64), np.zeros(0, np.int64)
    for part in range(spill.parts):
        keys, counts, _ = spill.totals(part)
        keys, counts = top_rows(keys, counts, k)
        best_keys, best_counts = top_rows(np.concatenate([best_keys, keys]), np.concatenate([best_counts, counts]), k)
    return best_keys, best_counts
