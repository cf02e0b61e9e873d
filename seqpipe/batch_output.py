"""What ``seqpipe batches`` prints: decoded text, JSON Lines, or the stream fingerprint."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import TYPE_CHECKING, Final

if TYPE_CHECKING:
    import numpy as np

    from seqpipe.dataset import Dataset
    from seqpipe.mixture import MixtureStream
    from seqpipe.tokenizers.base import Encoder
    from seqpipe.windows import Batch, BatchStream

FORMATS: Final = ("text", "jsonl", "hash")
SHOWN_WIDTH: Final = 160  # characters of one decoded row in text output; longer rows end in "…"

# Control characters (C0, DEL, C1) and the Unicode line and paragraph separators would break a
# row of text output across lines or move the cursor, so text output shows them escaped.
_ESCAPES: Final[dict[int, str]] = {
    **{c: f"\\x{c:02x}" for c in (*range(0x20), *range(0x7F, 0xA0))},
    **{c: f"\\u{c:04x}" for c in (0x2028, 0x2029)},
    ord("\n"): "\\n",
    ord("\r"): "\\r",
    ord("\t"): "\\t",
}


def _selected(stream: BatchStream | MixtureStream, limit: int | None) -> Iterator[Batch]:
    start = stream.start_step
    end = len(stream) if limit is None else min(len(stream), start + limit)
    for step in range(start, end):
        yield stream.batch(step)


def shown_tokens(encoder: Encoder, ids: np.ndarray, width: int = SHOWN_WIDTH) -> str:
    """Tokens as ``[text]`` with control characters escaped, cut to ``width`` characters."""
    text = "".join(f"[{encoder.token_text(int(i)).translate(_ESCAPES)}]" for i in ids)
    return text if len(text) <= width else text[: width - 1] + "…"


def _shown_boundaries(mask: np.ndarray) -> str:
    where = mask.nonzero()[0].tolist()
    if not where:
        return "no document starts in this row"
    return "a new document starts at target " + ", ".join(map(str, where))


def _print_jsonl(batches: Iterator[Batch]) -> None:
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
        for name in ("loss_mask", "doc_index", "doc_position"):
            value = getattr(b, name)
            if value is not None:
                row[name] = value.astype(int).tolist()
        print(json.dumps(row))


def _print_text(ds: Dataset, stream: BatchStream | MixtureStream, batches: Iterator[Batch]) -> None:
    print(
        f"{len(stream)} batches per epoch ({stream.order} order, window {stream.window}); "
        f"showing from step {stream.start_step}"
    )
    for b in batches:
        flag = " (fresh: reset state)" if b.fresh and stream.order == "sequential" else ""
        print(f"step {b.step} epoch {b.epoch}{flag}")
        for r in range(len(b.inputs)):
            print(f"  row {r} from token {int(b.starts[r])}")
            print(f"    inputs : {shown_tokens(ds.encoder, b.inputs[r])}")
            print(f"    targets: {shown_tokens(ds.encoder, b.targets[r])}")
            if b.mask is not None:
                print(f"    boundaries: {_shown_boundaries(b.mask[r])}")
            if b.loss_mask is not None:
                print(f"    scored : {int(b.loss_mask[r].sum())} of {b.loss_mask.shape[1]} targets")
            if b.doc_position is not None:
                print(f"    positions: {' '.join(map(str, b.doc_position[r].tolist()))}")


def print_batches(ds: Dataset, stream: BatchStream | MixtureStream, *, limit: int | None, fmt: str) -> None:
    """Print at most ``limit`` batches of ``stream`` from its ``start_step`` in format ``fmt``.

    ``text`` shows decoded tokens per row (and, with boundaries, where documents start),
    ``jsonl`` one JSON object per batch, ``hash`` the :func:`stream_fingerprint` of the batches.
    """
    from seqpipe.errors import StreamError
    from seqpipe.windows import stream_fingerprint

    if limit is not None and limit < 0:
        raise StreamError(f"--limit: expected an integer >= 0, got {limit}", key="limit")
    if fmt not in FORMATS:
        raise StreamError(f"--format: expected one of {', '.join(FORMATS)}, got {fmt!r}", key="format")
    batches = _selected(stream, limit)
    if fmt == "hash":
        print(stream_fingerprint(batches))
    elif fmt == "jsonl":
        _print_jsonl(batches)
    else:
        _print_text(ds, stream, batches)
