"""Parquet files: one document per row, the text in one string column.

Parts are runs of whole row groups; a read streams the one column it needs with
``ParquetFile.iter_batches``, sized in rows from the column's recorded size so a
batch holds about ``batch_bytes`` of text. Errors name the file and the row index
(0-based, counted over the whole file).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING, ClassVar

import pyarrow as pa

from seqpipe._parse import parse_int
from seqpipe.filesystem import SourcePath, open_input_file
from seqpipe.sources._columnar import finish_column, group_parts, guarded, open_or_fail, text_column
from seqpipe.sources.base import DEFAULT_BATCH_BYTES, DocumentFinisher, Part, ReadStats, RecordSource

if TYPE_CHECKING:
    import pyarrow.parquet as pq


@dataclass(frozen=True, slots=True)
class ParquetSource(RecordSource):
    """Recipe ``kind = "parquet"``: Parquet files with a string column ``field``."""

    kind: ClassVar[str] = "parquet"

    def _open(self, path: SourcePath) -> pq.ParquetFile:
        import pyarrow.parquet as pq  # on first use: it pulls in pyarrow.fs, which other kinds skip

        return open_or_fail(lambda: pq.ParquetFile(open_input_file(path)), path, "Parquet file")

    def plan(self, path: SourcePath, target_bytes: int) -> list[Part]:
        """Runs of row groups of about ``target_bytes`` (uncompressed, as the file records)."""
        parse_int("target_bytes", target_bytes, minimum=1)
        meta = self._open(path).metadata
        sizes = [meta.row_group(i).total_byte_size for i in range(meta.num_row_groups)]
        return group_parts(sizes, target_bytes)

    def read(
        self, path: SourcePath, part: Part, stats: ReadStats, *, batch_bytes: int = DEFAULT_BATCH_BYTES
    ) -> Iterator[pa.Array]:
        """Text values of the rows in row groups ``[part.start, part.stop)``."""
        parse_int("batch_bytes", batch_bytes, minimum=1)
        handle = self._open(path)
        text_column(handle.schema_arrow, self.field, path)
        meta = handle.metadata
        stop = meta.num_row_groups if part.stop is None else min(part.stop, meta.num_row_groups)
        groups = list(range(part.start, stop))
        if not groups:
            return
        row = sum(meta.row_group(i).num_rows for i in range(part.start))
        rows = sum(meta.row_group(i).num_rows for i in groups)
        text_bytes = 0
        for i in groups:
            group = meta.row_group(i)
            for j in range(group.num_columns):
                if group.column(j).path_in_schema == self.field:
                    text_bytes += group.column(j).total_uncompressed_size
        per_row = max(1, text_bytes // max(1, rows))
        batch_rows = max(1, batch_bytes // per_row)
        finisher = DocumentFinisher(self, path, stats)
        batches = handle.iter_batches(batch_size=batch_rows, row_groups=groups, columns=[self.field], use_threads=False)
        for batch in guarded(batches, path, "Parquet file"):
            column = batch.column(0)
            docs = finish_column(column, row, self, finisher)
            row += len(column)
            if len(docs):
                stats.documents += len(docs)
                yield docs
