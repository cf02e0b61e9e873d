"""What a recipe's cleaning steps would remove, found without building (``build --dry-run-filters``).

Reads every input the build would read, runs the ``[[clean]]`` steps in recipe order exactly as
an ingest task does, and counts per step the documents it drops and, for ``redact`` steps, the
matches it replaces. Nothing is written: no cache, no dataset. Exact and near duplicates
(``dedupe``, ``near_dedupe``) are found across the whole corpus by the build and are not
counted here.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from seqpipe.recipe import Recipe


@dataclass(frozen=True, slots=True)
class FilterPreview:
    """Documents read, documents each dropping step would remove (``"i:kind"`` as in the build
    summary), matches replaced by target, and documents left."""

    documents: int
    dropped: dict[str, int] = field(default_factory=dict)
    redacted: dict[str, int] = field(default_factory=dict)
    kept: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {"documents": self.documents, "dropped": self.dropped, "redacted": self.redacted, "kept": self.kept}

    def lines(self) -> list[str]:
        """A short table for people: one line per step that drops or replaces anything."""
        out = [f"read         {self.documents} documents"]
        for name, count in self.dropped.items():
            share = count / self.documents if self.documents else 0.0
            out.append(f"clean {name:<20} would remove {count:>9} ({share:.2%})")
        for target, count in self.redacted.items():
            out.append(f"redact {target:<19} would replace {count:>8}")
        out.append(f"kept         {self.kept} documents (duplicates not counted: the build finds them)")
        return out


def _inputs(recipe: Recipe) -> list[tuple[int, Path | str]]:
    from seqpipe.filesystem import identity

    files: list[tuple[int, Path | str]] = []
    seen: set[Any] = set()
    for si, source in enumerate(recipe.sources):
        for f in source.resolve(recipe.root):
            if identity(f) not in seen:  # a file two sources match is read once, as in the build
                seen.add(identity(f))
                files.append((si, f))
    return files


def _run_steps(recipe: Recipe, docs: pa.Array, dropped: dict[str, int], redacted: dict[str, int]) -> int:
    """Run the clean steps on one batch; add to the counts; return the documents left."""
    for i, step in enumerate(recipe.clean):
        name = f"{i}:{step.kind}"
        before = len(docs)
        keep = getattr(step, "keep", None)
        counted = getattr(step, "apply_counted", None)
        if getattr(step, "is_dedupe", False):
            continue
        if keep is not None:
            docs = docs.filter(pa.array(np.asarray(keep(docs), dtype=bool)))
        elif counted is not None:
            docs, counts = counted(docs)
            for target, n in counts.items():
                redacted[target] = redacted.get(target, 0) + n
        else:
            docs = step.apply(docs)
        if keep is not None or len(docs) != before:
            dropped[name] = dropped.get(name, 0) + before - len(docs)
    return len(docs)


def preview_filters(recipe: Recipe) -> FilterPreview:
    """Count what each cleaning step of ``recipe`` would remove from its inputs (see module docstring)."""
    from seqpipe.sources.base import ReadStats

    stats = ReadStats()
    documents = kept = 0
    dropped: dict[str, int] = {f"{i}:{s.kind}": 0 for i, s in enumerate(recipe.clean) if hasattr(s, "keep")}
    redacted: dict[str, int] = {}
    for si, path in _inputs(recipe):
        source = recipe.sources[si]
        for part in source.plan(path, 64 << 20):
            for batch in source.read(path, part, stats):
                documents += len(batch)
                kept += _run_steps(recipe, batch, dropped, redacted)
    return FilterPreview(documents, dropped, redacted, kept)
