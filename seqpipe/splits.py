"""Split assignment: each document's split follows from its content hash and the split seed.

A document's split depends on nothing but its own cleaned text, the fractions and the seed, so
it keeps its split when other documents are added, removed or reordered, and any task can
compute it for its own part without asking the driver. The index follows ``SPLIT_NAMES``
(0 train, 1 validation, 2 test); -1 marks a dropped duplicate.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Final

import numpy as np

from seqpipe.recipe import SplitSpec

DROPPED: Final = -1
_MASK64: Final = (1 << 64) - 1
# The splitmix64 generator's constants: its increment (2**64 divided by the golden ratio, made
# odd) spreads consecutive seeds over all 64 bits, and its finalizer (shifts 30, 27, 31 and the
# two multipliers, Stafford's "Mix13") mixes every input bit into every output bit. Source:
# Steele, Lea and Flood, "Fast Splittable Pseudorandom Number Generators", OOPSLA 2014, and
# Java's SplittableRandom, which uses the same numbers (from memory)
_SEED_STEP: Final = 0x9E3779B97F4A7C15
_MIX1: Final = 0xBF58476D1CE4E5B9
_MIX2: Final = 0x94D049BB133111EB


def split_of(hashes: np.ndarray, fractions: Sequence[float], seed: int) -> np.ndarray:
    """Split index (int8) per document from its (n, 16) uint8 content hash: the hash's first
    8 bytes (little-endian) mixed with the seed give a uniform number in [0, 1), which the
    cumulative ``fractions`` cut into splits."""
    x = hashes[:, :8].copy().view("<u8").reshape(-1).astype(np.uint64)
    x ^= np.uint64((seed * _SEED_STEP) & _MASK64)  # in Python ints: no overflow warning
    x ^= x >> np.uint64(30)
    x *= np.uint64(_MIX1)
    x ^= x >> np.uint64(27)
    x *= np.uint64(_MIX2)
    x ^= x >> np.uint64(31)
    # the top 53 bits: every value exactly representable in a float64 (common practice)
    u = (x >> np.uint64(11)).astype(np.float64) / float(1 << 53)
    edges = np.cumsum(fractions)[:-1]
    return np.searchsorted(edges, u, side="right").astype(np.int8)


def assign_splits(spec: SplitSpec, hashes: np.ndarray, keep: np.ndarray | None, fixed: int | None = None) -> np.ndarray:
    """Split index per document of a part (from its (n, 16) content hashes, or ``fixed`` for
    every document of a source with a fixed split); ``DROPPED`` where ``keep`` (bool per
    document, None: keep all) drops a duplicate or an overlap with a held-out split."""
    if fixed is None:
        splits = split_of(hashes, spec.fractions(), spec.seed)
    else:
        splits = np.full(len(hashes), fixed, dtype=np.int8)
    return splits if keep is None else np.where(keep, splits, DROPPED).astype(np.int8)


def fixed_split_of(source: Any) -> int | None:
    """The split index a source sends all its documents to, or None (hash-based)."""
    from seqpipe.recipe import SPLIT_NAMES

    name = getattr(source, "fixed_split", "")
    return SPLIT_NAMES.index(name) if name else None


def held_out_overlap(train_hashes: np.ndarray, held: np.ndarray) -> np.ndarray:
    """Bool per row of ``train_hashes`` ((n, 16) uint8): True where the content also occurs in
    ``held`` (the sorted distinct 16-byte hashes of fixed validation/test documents)."""
    if len(train_hashes) == 0 or len(held) == 0:
        return np.zeros(len(train_hashes), dtype=bool)
    rows = np.ascontiguousarray(train_hashes).view("V16").reshape(-1)
    return np.isin(rows, held)
