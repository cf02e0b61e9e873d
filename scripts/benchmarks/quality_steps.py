"""CPU time of each quality filter and of redact, per MB of text, on the quality bench's corpus.

Not a bench part (nothing is judged): it splits the ``clean.filters_overhead`` line's cost by
phase, as a build's ingest thread meets them on each 1 MB batch: the code points beyond ASCII,
the word cut (whitespace bytes included), the line cut, each filter's ``keep`` on the shared
cuts, and ``redact`` on the documents the filters keep. CPU seconds (``time.process_time``),
the least of a few passes, so other work on the machine inflates them less than wall time.

    python scripts/benchmarks/quality_steps.py [MB] [passes]
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import pyarrow as pa

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from part_quality import recipe_for, write_corpus

from seqpipe.clean._quality import lines, utf8_buffers, wide_code_points
from seqpipe.clean._word_table import word_table
from seqpipe.sources.base import ReadStats


def fresh(docs: pa.Array) -> pa.Array:
    """The same documents as a new array object (the per-thread cuts are kept per array)."""
    return pa.Array.from_buffers(docs.type, len(docs), docs.buffers(), offset=docs.offset)


def main() -> None:
    size = int(sys.argv[1]) if len(sys.argv) > 1 else 30
    passes = int(sys.argv[2]) if len(sys.argv) > 2 else 3
    with tempfile.TemporaryDirectory(prefix="seqpipe-quality-steps-") as tmp:
        root = Path(tmp)
        write_corpus(root, size * 1_000_000)
        recipe = recipe_for(root, "filters")
        batches = list(recipe.sources[0].documents(root, ReadStats(), batch_bytes=1 << 20))
    lower, steps = recipe.clean[0], recipe.clean[1:]
    docs = [lower.apply(b) for b in batches]  # the recipe lower-cases before the filters
    filters = [s for s in steps if hasattr(s, "keep")]
    redact = steps[-1]
    kept = [d.filter(pa.array(np.logical_and.reduce([f.keep(d) for f in filters]))) for d in docs]
    mb = sum(len(utf8_buffers(d)[0]) for d in docs) / 1e6
    best: dict[str, float] = {}
    for _ in range(passes):
        spent: dict[str, float] = defaultdict(float)
        for batch, survivors in zip(docs, kept, strict=True):
            array = fresh(batch)
            phases = [
                ("code points beyond ASCII", wide_code_points, array),
                ("word cut", word_table, array),
                ("line cut", lines, array),
                *((f.kind, f.keep, array) for f in filters),
                ("redact", redact.apply_counted, survivors),
            ]
            for name, call, argument in phases:
                t0 = time.process_time()
                call(argument)
                spent[name] += time.process_time() - t0
        for name, seconds in spent.items():
            best[name] = min(best.get(name, seconds), seconds)
    for name, seconds in best.items():
        print(f"{name:26s} {seconds * 1000 / mb:6.2f} ms CPU per MB")
    print(f"{'all':26s} {sum(best.values()) * 1000 / mb:6.2f} ms CPU per MB ({mb:.1f} MB, least of {passes} passes)")


if __name__ == "__main__":
    main()
