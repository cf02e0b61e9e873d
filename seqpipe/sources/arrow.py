"""Arrow IPC files (the columnar format's "IPC File Format"): one document per row.

A local file is memory-mapped, so record batches are read without a copy (a file
named by a filesystem URI is read through pyarrow's random-access file); parts are
runs of whole record batches and each batch is sliced to about ``batch_bytes``
of text. Errors name the file and the row index (0-based, over the whole file).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import ClassVar

import pyarrow as pa

from seqpipe._parse import parse_int
from seqpipe.errors import SourceError
from seqpipe.filesystem import SourcePath, open_input_file
from seqpipe.sources._columnar import (
    byte_slices,
    checked_column,
    finish_column,
    group_parts,
    guarded,
    open_or_fail,
    text_column,
)
from seqpipe.sources.base import DEFAULT_BATCH_BYTES, DocumentFinisher, Part, ReadStats, RecordSource


@dataclass(frozen=True, slots=True)
class ArrowSource(RecordSource):
    """Recipe ``kind = "arrow"``: Arrow IPC files with a string column ``field``."""

    kind: ClassVar[str] = "arrow"
    what: ClassVar[str] = "Arrow IPC file"

    def _open(self, path: SourcePath) -> pa.ipc.RecordBatchFileReader:
        return open_or_fail(
            lambda: pa.ipc.open_file(open_input_file(path, memory_map=True)),
            path,
            f"{self.what} (the file format, not the stream format)",
        )

    def plan(self, path: SourcePath, target_bytes: int) -> list[Part]:
        """Runs of record batches of about ``target_bytes``."""
        parse_int("target_bytes", target_bytes, minimum=1)
        reader = self._open(path)
        index = text_column(reader.schema, self.field, path)
        sizes, row = [], 0
        for batch in guarded((reader.get_record_batch(i) for i in range(reader.num_record_batches)), path, self.what):
            # nbytes follows the offsets of every column, so the file's claims are checked first
            try:
                batch.validate()
            except pa.ArrowException as exc:
                raise SourceError(
                    str(path), f"malformed record batch at row {row} ({exc}); re-export the file"
                ) from exc
            checked_column(batch.column(index), path, row)
            sizes.append(batch.column(index).nbytes)
            row += batch.num_rows
        return group_parts(sizes, target_bytes)

    def read(
        self, path: SourcePath, part: Part, stats: ReadStats, *, batch_bytes: int = DEFAULT_BATCH_BYTES
    ) -> Iterator[pa.Array]:
        """Text values of the rows in record batches ``[part.start, part.stop)``."""
        parse_int("batch_bytes", batch_bytes, minimum=1)
        reader = self._open(path)
        index = text_column(reader.schema, self.field, path)
        count = reader.num_record_batches
        stop = count if part.stop is None else min(part.stop, count)
        finisher = DocumentFinisher(self, path, stats)
        row = sum(reader.get_record_batch(i).num_rows for i in range(min(part.start, count)))
        batches = (reader.get_record_batch(i) for i in range(part.start, stop))
        for batch in guarded(batches, path, self.what):
            column = checked_column(batch.column(index), path, row)
            for offset, piece in byte_slices(column, batch_bytes):
                docs = finish_column(piece, row + offset, self, finisher)
                if len(docs):
                    stats.documents += len(docs)
                    yield docs
            row += batch.num_rows
