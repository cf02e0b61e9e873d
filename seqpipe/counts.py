"""Merging per-part piece counts, and first occurrences of document keys (the build's count
and dedupe steps in the driver).

Count tables carry ``(key, count, first)``: ``first`` is the part's corpus position shifted
left by 40 bits plus the key's first position within the part's train pieces, so sorting by it
gives corpus first-occurrence order whatever order the parts were counted in.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from seqpipe.errors import SeqpipeError


class CountMerger:
    """Partial ``(key, count, first)`` tables merged with Arrow group-by as they arrive, 8 at a
    time, so the driver holds at most 8 of them besides the running total. Sums and minima do
    not depend on arrival order, and every key's ``first`` is unique, so the final sort by
    ``first`` gives the same table whatever order the tasks finish in."""

    def __init__(self, batch: int = 8) -> None:
        self.batch = batch
        self.pending: list[pa.Table] = []
        self.acc: pa.Table | None = None
        self.train_documents = 0
        self.expected = 0  # tables announced by ``expect``
        self.received = 0

    def expect(self, n: int) -> None:
        """``n`` more tables will arrive."""
        self.expected += n

    def add(self, counted: tuple[pa.Table, int]) -> None:
        """One part's count table and its number of train documents."""
        table, train_documents = counted
        self.pending.append(table)
        self.train_documents += train_documents
        self.received += 1
        # with one table still to come, fold now: the fold after the last table, which nothing
        # runs beside, then merges that table alone into the total
        if len(self.pending) >= self.batch or (self.received == self.expected - 1 and len(self.pending) > 1):
            self._fold()

    def _fold(self) -> None:
        group = self.pending + ([self.acc] if self.acc is not None else [])
        self.pending = []
        # a copy into fresh (aligned) buffers: tables unpickled from cluster workers may sit at
        # odd offsets, which Arrow's group-by warns about
        cat = pa.concat_tables(group)
        cat = pa.table(
            {
                name: pa.concat_arrays([*cat.column(name).chunks, pa.array([], cat.schema.field(name).type)])
                for name in cat.column_names
            }
        )
        self.acc = (
            cat.group_by("key")
            .aggregate([("count", "sum"), ("first", "min")])
            .rename_columns(["key", "count", "first"])
        )

    def result(self) -> pa.Table:
        """Corpus-wide ``(key, count)`` in first-occurrence order."""
        if self.pending:
            self._fold()
        if self.acc is None:
            raise SeqpipeError("nothing to count")
        acc = self.acc.sort_by([("first", "ascending")])
        return acc.select(["key", "count"]).cast(pa.schema([("key", pa.binary()), ("count", pa.int64())]))


def first_occurrence(keys: np.ndarray) -> np.ndarray:
    """Bool per row of an (n, 16) uint8 array: True where this 16-byte key occurs for the first time."""
    if len(keys) == 0:
        return np.zeros(0, dtype=bool)
    rows = np.ascontiguousarray(keys).view("V16").reshape(-1)
    _, first = np.unique(rows, return_index=True)
    keep = np.zeros(len(keys), dtype=bool)
    keep[first] = True
    return keep
