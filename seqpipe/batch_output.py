"""What ``seqpipe batches`` prints: decoded text, JSON Lines, or the stream fingerprint."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from seqpipe.dataset import Dataset
    from seqpipe.windows import Batch, BatchStream


def _selected(stream: BatchStream, start: int, limit: int | None) -> Iterator[Batch]:
    end = len(stream) if limit is None else min(len(stream), start + limit)
    for step in range(start, end):
        yield stream.batch(step)


def _show(ds: Dataset, ids: object, width: int) -> str:
    enc = ds.encoder
    text = "".join(f"[{enc.token_text(int(i))}]" for i in ids)  # type: ignore[attr-defined]
    return text if len(text) <= width else text[: width - 1] + "…"


def print_batches(ds: Dataset, stream: BatchStream, *, start: int, limit: int | None, fmt: str) -> None:
    """Print the selected batches of ``stream`` in format ``text``, ``json`` or ``hash``."""
    from seqpipe.errors import StreamError
    from seqpipe.windows import stream_fingerprint

    if start < 0 or start > len(stream):
        raise StreamError(f"--start {start} is outside the epoch's {len(stream)} steps")
    if limit is not None and limit < 0:
        raise StreamError(f"--limit must be >= 0, got {limit}")
    batches = _selected(stream, start, limit)
    if fmt == "hash":
        print(stream_fingerprint(batches))
        return
    if fmt == "json":
        for b in batches:
            row = {
                "step": b.step,
                "epoch": b.epoch,
                "fresh": b.fresh,
                "starts": b.starts.tolist(),
                "inputs": b.inputs.tolist(),
                "targets": b.targets.tolist(),
            }
            if b.mask is not None:
                row["mask"] = b.mask.astype(int).tolist()
            print(json.dumps(row))
        return
    print(f"{len(stream)} batches per epoch; showing from step {start}")
    for b in batches:
        flag = " (fresh: reset state)" if b.fresh and stream.order == "sequential" else ""
        print(f"step {b.step} epoch {b.epoch}{flag}")
        for r in range(len(b.inputs)):
            print(f"  row {r} @ {int(b.starts[r])}")
            print(f"    inputs : {_show(ds, b.inputs[r], 160)}")
            print(f"    targets: {_show(ds, b.targets[r], 160)}")
