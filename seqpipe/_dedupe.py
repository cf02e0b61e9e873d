"""Which documents a build drops, worked out in hash-partitioned tasks so the driver's memory
depends on the number of parts, not of documents.

The phases (each a set of executor tasks; files in the build's work directory)::

    keys     task per part: its documents' keys (exact ``dedupe`` hash; a 64-bit key per
             near_dedupe band, :func:`band_keys`) into one Arrow IPC file whose record batch p
             holds partition p (exact: by key hash; near: by key range, batches nearly sorted by key)
    group    task per partition: batch p of every part, grouped by key. Exact: every occurrence
             after the first in corpus order is dropped. Near: rows whose band key repeats are
             checked against their band's values in the signatures (regrouped by the values
             where two bands' keys collide); in each band bucket, a document
             whose signature equals an earlier member's is dropped (whatever happens to that
             one, the same earlier document that drops it drops this one); the other members
             give candidate pairs (earlier, later), confirmed where the estimated Jaccard
             similarity reaches the threshold (signatures read from the parts, for candidates only)
    resolve  driver: the confirmed pairs (they scale with near-copies, not documents) in corpus
             order, as clean.near_dedupe.near_duplicate_keep does: a document is dropped when
             an earlier *kept* document is its near-copy
    finish   task per part: its drop list (exact, near) into one file; with a fixed validation
             or test source, the hashes for the overlap check, partitioned like the keys
    overlap  task per partition: train documents whose content a held-out document also has

Count and encode tasks read their part's drop list by path (``masked_count``,
``masked_encode``). Every grouping breaks ties by (part, row), so results do not depend on the
number of partitions, workers or the order tasks finish in.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import os
import shutil
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import numpy as np
import pyarrow as pa

from seqpipe.clean._quality import mix64
from seqpipe.counts import first_occurrence
from seqpipe.errors import ShardCorruptError
from seqpipe.ingest import count_part, encode_part, fixed16, part_file, read_part_docs
from seqpipe.recipe import SplitSpec
from seqpipe.shards import read_table
from seqpipe.splits import assign_splits

# Rows a group task holds at most per partition (exact: one per document, near: one per
# document and band): about 40 bytes each, so some 40 MB of keys in a worker at most.
ROWS_PER_PARTITION: Final = 1 << 20
MAX_PARTITIONS: Final = 4096
_GOLDEN: Final = np.uint64(0x9E3779B97F4A7C15)
_PLACES: Final = pa.schema([("part", pa.int32()), ("row", pa.int32())])


@dataclass(frozen=True, slots=True)
class Scheme:
    """What every task of the drop phases shares: where parts and work files are, how many
    partitions, and which steps run (``near``: bands, rows, threshold)."""

    cache_dir: str
    work_dir: str
    parts: int
    partitions: int
    exact: bool
    near: tuple[int, int, float] | None = None
    splits: SplitSpec | None = None  # set when held-out overlap is checked
    exclude_overlap: bool = False


def partitions_for(documents: int, rows_per_document: int) -> int:
    """Partitions so that no group task holds more than ROWS_PER_PARTITION rows (on average:
    the keys are hashes, so partitions are even). Depends on the corpus only, never on workers."""
    rows = documents * max(1, rows_per_document)
    return int(min(MAX_PARTITIONS, max(1, -(-rows // ROWS_PER_PARTITION))))


def _path(scheme: Scheme, kind: str, number: int) -> Path:
    return Path(scheme.work_dir) / kind / f"{number:06d}.arrow"


def _write(path: Path, schema: pa.Schema, batches: Sequence[pa.RecordBatch]) -> None:
    """An intermediate Arrow IPC file (no fsync: a crash reruns the build's phase)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with pa.OSFile(str(tmp), "wb") as sink, pa.ipc.new_file(sink, schema) as writer:
        for batch in batches:
            writer.write_batch(batch)
    os.replace(tmp, path)


def _write_partitioned(
    path: Path, columns: dict[str, pa.Array], where: np.ndarray, partitions: int, order: np.ndarray | None = None
) -> None:
    """Rows into record batch ``where[i]`` of ``path``, in the order ``order`` within a batch (else
    as they come)."""
    order = np.arange(len(where)) if order is None else order
    # where < MAX_PARTITIONS: as uint16, numpy's stable sort is a radix sort
    order = order[np.argsort(where[order].astype(np.uint16), kind="stable")]
    bounds = np.searchsorted(where[order], np.arange(partitions + 1))
    taken = {name: col.take(pa.array(order)) for name, col in columns.items()}
    schema = pa.schema([(name, col.type) for name, col in taken.items()])
    batches = [
        pa.record_batch([col.slice(a, b - a) for col in taken.values()], schema=schema)
        for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist(), strict=True)
    ]
    _write(path, schema, batches)


def _open(path: Path) -> Any:
    try:
        return pa.ipc.open_file(pa.memory_map(str(path), "r"))
    except (OSError, pa.ArrowInvalid) as exc:
        raise ShardCorruptError(
            f"{path}: a work file of the dedupe phases cannot be read ({exc}); run the build again",
            path=str(path),
        ) from exc


def _batch(path: Path, index: int) -> pa.RecordBatch:
    return _open(path).get_record_batch(index)


def _binary(values: np.ndarray) -> pa.Array:
    """(n, width) uint8 rows as a fixed_size_binary(width) array."""
    n, width = values.shape
    return pa.FixedSizeBinaryArray.from_buffers(
        pa.binary(width), n, [None, pa.py_buffer(np.ascontiguousarray(values).tobytes())]
    )


def _rows(array: pa.Array, width: int) -> np.ndarray:
    """A fixed_size_binary(width) array as (n, width) uint8."""
    n = len(array)
    buf = array.buffers()[1]
    if buf is None or n == 0:
        return np.zeros((0, width), np.uint8)
    return np.frombuffer(buf, np.uint8)[array.offset * width : (array.offset + n) * width].reshape(n, width)


# -- keys: a task per part ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PartTask:
    scheme: Scheme
    number: int  # the part's position in corpus order
    key: str  # its cache key
    documents: int
    fixed: int | None = None  # the split of a source with a fixed split


def band_keys(sig: np.ndarray, bands: int, rows: int) -> np.ndarray:
    """Band-major (n * bands) uint64: a hash of each (band, document)'s band index and ``rows``
    values. Equal bands give equal keys; different ones rarely do, and the group task checks."""
    n = len(sig)
    values = sig.reshape(n, bands, rows)
    with np.errstate(over="ignore"):
        h = np.empty((n, bands), np.uint64)  # document-major like the signatures, made band-major once
        h[:] = mix64(np.arange(bands, dtype=np.uint64) * _GOLDEN + _GOLDEN)
        for r in range(rows):  # a loop over a band's rows, not over documents: a polynomial, mixed once
            h += values[:, :, r]
            h *= _GOLDEN
    return mix64(h.T).ravel()


def write_keys(task: PartTask) -> int:
    """Phase keys: the part's exact and band keys, partitioned by key hash; returns its documents."""
    scheme = task.scheme
    n = task.documents
    p = np.uint64(scheme.partitions)
    if scheme.exact:
        table = read_part_docs(scheme.cache_dir, task.key)
        n = table.num_rows
        keys = fixed16(table, "dedupe")
        where = (np.ascontiguousarray(keys[:, :8]).view("<u8").ravel() % p).astype(np.int64)
        columns = {"key": _binary(keys), "row": pa.array(np.arange(n, dtype=np.int32))}
        _write_partitioned(_path(scheme, "exact", task.number), columns, where, scheme.partitions)
    if scheme.near is not None:
        bands, rows, _ = scheme.near
        # per (band, document) 14 bytes: the band's key, band and row (the values stay in the part)
        sig = _part_signatures(scheme.cache_dir, task.key, bands * rows)
        n = len(sig)
        key = band_keys(sig, bands, rows)
        # each batch (nearly) sorted by key: a group task merges sorted runs, not a shuffle; a
        # near partition is a range of keys (by their top 32 bits, which the order follows), so
        # the ordered keys are already in partition order
        order = _key_order(key)
        ordered = key[order]
        where = ((ordered >> np.uint64(32)) * p) >> np.uint64(32)
        bounds = np.searchsorted(where, np.arange(scheme.partitions + 1, dtype=np.uint64)).tolist()
        band, row = np.divmod(order, max(n, 1))
        arrays = [pa.array(band.astype(np.int16)), pa.array(ordered), pa.array(row.astype(np.int32))]
        schema = pa.schema([("band", pa.int16()), ("key", pa.uint64()), ("row", pa.int32())])
        batches = [
            pa.record_batch([col.slice(a, b - a) for col in arrays], schema=schema)
            for a, b in itertools.pairwise(bounds)
        ]
        _write(_path(scheme, "near", task.number), schema, batches)
    return int(n)


def _key_order(key: np.ndarray) -> np.ndarray:
    """Positions of ``key`` in the order of their top 32 bits, ties by position: two stable sorts
    of 16-bit digits (numpy sorts those by radix), cheaper than one sort of 64-bit keys. Keys
    equal in those bits but not in the rest may stay out of order; the group task's stable sort
    puts them in place (such keys are rare, so its runs stay sorted)."""
    order = np.argsort((key >> np.uint64(32)).astype(np.uint16), kind="stable")
    return order[np.argsort((key >> np.uint64(48)).astype(np.uint16)[order], kind="stable")]


# -- group: a task per partition ---------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PartitionTask:
    scheme: Scheme
    partition: int


@dataclass(frozen=True, slots=True)
class Grouped:
    """What a group task found in its partition (figures only; the rows are in its files)."""

    exact: int  # exact duplicates dropped
    repeats: int  # documents whose signature equals an earlier one's in a shared band
    pairs: int  # confirmed near pairs


def _gathered(scheme: Scheme, kind: str, partition: int) -> tuple[pa.Table, np.ndarray]:
    """Batch ``partition`` of every part's ``kind`` file, in corpus order, and the part of each row."""
    batches: list[pa.RecordBatch] = []
    parts: list[np.ndarray] = []
    for n in range(scheme.parts):
        batch = _batch(_path(scheme, kind, n), partition)
        if batch.num_rows:
            batches.append(batch)
            parts.append(np.full(batch.num_rows, n, np.int64))
    if not batches:
        return pa.table({}), np.zeros(0, np.int64)
    return pa.Table.from_batches(batches), np.concatenate(parts)


def _places(ids: np.ndarray) -> list[pa.RecordBatch]:
    """Document ids (part << 32 | row), sorted, as one (part, row) batch."""
    ids = np.unique(ids)
    return [
        pa.record_batch(
            [pa.array((ids >> 32).astype(np.int32)), pa.array((ids & 0xFFFFFFFF).astype(np.int32))], schema=_PLACES
        )
    ]


def _ids(parts: np.ndarray, rows: np.ndarray) -> np.ndarray:
    return (parts.astype(np.int64) << 32) | rows.astype(np.int64)


def group_partition(task: PartitionTask) -> Grouped:
    """Phase group for one partition: exact drops, signature repeats and confirmed near pairs
    into this partition's files."""
    scheme, p = task.scheme, task.partition
    exact = 0
    if scheme.exact:
        table, parts = _gathered(scheme, "exact", p)
        drops = np.zeros(0, np.int64)
        if len(parts):
            dropped = ~first_occurrence(_rows(table.column("key").combine_chunks(), 16))
            drops = _ids(parts[dropped], table.column("row").to_numpy()[dropped])  # ids of the drops only
        _write(_path(scheme, "exact-drops", p), _PLACES, _places(drops))
        exact = len(drops)
    repeats = pairs = np.zeros(0, np.int64)
    if scheme.near is not None:
        repeats, pairs = _near_partition(scheme, p)
        _write(_path(scheme, "repeats", p), _PLACES, _places(repeats))
        pair_schema = pa.schema([("earlier", pa.int64()), ("later", pa.int64())])
        batch = pa.record_batch([pa.array(pairs[:, 0]), pa.array(pairs[:, 1])], schema=pair_schema)
        _write(_path(scheme, "pairs", p), pair_schema, [batch])
    return Grouped(exact, len(repeats), len(pairs))


def _near_partition(scheme: Scheme, p: int) -> tuple[np.ndarray, np.ndarray]:
    """The partition's signature repeats (document ids) and confirmed (earlier, later) pairs."""
    assert scheme.near is not None
    bands, rows, threshold = scheme.near
    table, parts = _gathered(scheme, "near", p)
    none = np.zeros(0, np.int64), np.zeros((0, 2), np.int64)
    if len(parts) < 2:
        return none
    key = table.column("key").to_numpy()
    # every part's batch is sorted by key: a stable sort of the runs is a merge
    order = np.argsort(key, kind="stable")
    ordered = key[order]
    repeat = ordered[1:] == ordered[:-1]
    shared = np.zeros(len(key), bool)
    shared[1:] = repeat
    shared[:-1] |= repeat  # rows whose key another row has: most rows are alone and go no further
    if not shared.any():
        return none
    rows_at = order[shared]
    ids = _ids(parts[rows_at], table.column("row").to_numpy()[rows_at])
    band = table.column("band").to_numpy()[rows_at].astype(np.int64)
    bucket = ordered[shared]
    within = np.lexsort((ids, bucket))  # by key, then corpus order
    ids, band, bucket = ids[within], band[within], bucket[within]
    members, where = np.unique(ids, return_inverse=True)
    # one signature per document, not per row: a row finds its document's as own[where]
    own = _signatures(scheme, members, bands * rows)
    ids, where, bucket = _exact_buckets(ids, own, where.ravel(), band, bucket, rows)
    starts, ends = _runs(bucket)
    small = ends - starts <= _SMALL_BUCKET
    found_repeats, found_pairs = _small_buckets(ids, own, where, starts[small], ends[small] - starts[small], threshold)
    # larger buckets: one step each (most shared buckets hold two or three documents)
    for a, b in zip(starts[~small].tolist(), ends[~small].tolist(), strict=True):
        rep, pair = _bucket_pairs(ids[a:b], own[where[a:b]], threshold)
        found_repeats.append(rep)
        found_pairs.append(pair)
    pairs = np.unique(np.concatenate(found_pairs), axis=0)
    return np.unique(np.concatenate(found_repeats)), pairs.reshape(-1, 2)


def _exact_buckets(
    ids: np.ndarray, own: np.ndarray, where: np.ndarray, band: np.ndarray, bucket: np.ndarray, rows: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows grouped by key (sorted by key, then id; row i's signature ``own[where[i]]``) checked
    against their band's values: when every row equals its group's first on band and values (the
    keys did not collide), as they are; else regrouped by band and values, without the rows then
    alone, sorted by group and id. Returns the rows' ids, ``where`` and groups."""
    values = own[where[:, None], band[:, None] * rows + np.arange(rows)]
    first = np.flatnonzero(np.r_[True, bucket[1:] != bucket[:-1]])
    lead = np.repeat(first, np.diff(np.r_[first, len(bucket)]))
    if np.array_equal(values, values[lead]) and np.array_equal(band, band[lead]):
        return ids, where, bucket
    packed = np.ascontiguousarray(np.column_stack([band.astype(np.uint32), values]).astype("<u4"))
    _, exact, sizes = np.unique(
        packed.view(np.dtype((np.void, 4 * (rows + 1)))).ravel(), return_inverse=True, return_counts=True
    )
    exact = exact.ravel()
    kept = np.flatnonzero(sizes[exact] > 1)
    order = kept[np.lexsort((ids[kept], exact[kept]))]
    return ids[order], where[order], exact[order].astype(np.uint64)


_SMALL_BUCKET: Final = 8  # buckets up to this size are compared together, all pairs at once
_PAIR_BLOCK: Final = 1 << 14  # pairs compared per numpy pass: bounds the (pairs, hashes) temporaries


def _small_buckets(
    ids: np.ndarray, own: np.ndarray, where: np.ndarray, starts: np.ndarray, sizes: np.ndarray, threshold: float
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """:func:`_bucket_pairs` for many small buckets at once (rows ``start .. start + size`` of
    ``ids``, row i's signature ``own[where[i]]``, each bucket in corpus order), by bucket size: every pair of members is
    compared; a member equal to an earlier one is a repeat, and the pairs of members that are not
    repeats are kept when their estimated similarity reaches ``threshold``."""
    repeats: list[np.ndarray] = [np.zeros(0, np.int64)]
    pairs: list[np.ndarray] = [np.zeros((0, 2), np.int64)]
    for m in range(2, _SMALL_BUCKET + 1):
        first, second = np.triu_indices(m, 1)
        group = starts[sizes == m]
        step = max(1, _PAIR_BLOCK // len(first))
        for lo in range(0, len(group), step):
            base = group[lo : lo + step, None]
            a, b = (base + first).ravel(), (base + second).ravel()
            share = (own[where[a]] == own[where[b]]).mean(axis=1)
            repeated = np.unique(b[share == 1.0])
            repeats.append(ids[repeated])
            # pairs between members that are not repeats (their signatures differ: share < 1)
            keep = (share >= threshold) & ~np.isin(a, repeated) & ~np.isin(b, repeated)
            pairs.append(np.stack([ids[a[keep]], ids[b[keep]]], axis=1))
    return repeats, pairs


def _runs(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end of each run of equal values in a sorted array."""
    if len(values) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    starts = np.flatnonzero(np.r_[True, values[1:] != values[:-1]])
    return starts, np.r_[starts[1:], len(values)]


def _bucket_pairs(ids: np.ndarray, sig: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray]:
    """In one band bucket (members in corpus order): members whose signature an earlier member
    has (always dropped), and the (earlier, later) pairs of the others at ``threshold``. Every
    pair of distinct signatures is compared: quadratic in them, so a bucket of thousands of
    different near-copies of one text is what makes a group task slow, not the corpus size."""
    rows = np.ascontiguousarray(sig).view(np.dtype((np.void, sig.dtype.itemsize * sig.shape[1]))).ravel()
    _, first = np.unique(rows, return_index=True)
    first.sort()
    repeat = np.ones(len(ids), bool)
    repeat[first] = False
    if len(first) < 2:
        return ids[repeat], np.zeros((0, 2), np.int64)
    i, j = np.triu_indices(len(first), 1)
    own = sig[first]
    similar = (own[i] == own[j]).mean(axis=1) >= threshold  # the estimate near_duplicate_keep uses
    return ids[repeat], np.stack([ids[first][i[similar]], ids[first][j[similar]]], axis=1)


def _part_keys(scheme: Scheme) -> list[str]:
    path = Path(scheme.work_dir) / "parts.json"
    try:
        keys: list[str] = json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        raise ShardCorruptError(f"{path}: cannot read the parts list ({exc}); run the build again") from exc
    return keys


def _signatures(scheme: Scheme, members: np.ndarray, hashes: int) -> np.ndarray:
    """The signatures of ``members`` (sorted document ids), read from their parts' tables."""
    keys = _part_keys(scheme)
    out = np.empty((len(members), hashes), np.uint32)
    parts = members >> 32
    for n in np.unique(parts).tolist():
        at = np.flatnonzero(parts == n)
        out[at] = _part_signatures(scheme.cache_dir, keys[n], hashes)[members[at] & 0xFFFFFFFF]
    return out


def _part_signatures(cache_dir: str, key: str, hashes: int) -> np.ndarray:
    """A cached part's ``near`` column (its documents table's, see ingest.read_part_docs) as an
    (n, hashes) uint32 view of the mapped file: only the rows a caller takes are copied."""
    path = part_file(cache_dir, key)
    near = read_table(path).column("near")  # one row: the part's list of signatures
    column = near.chunk(0) if near.num_chunks == 1 else near.combine_chunks()  # (that one copies the values)
    if len(column) != 1 or not pa.types.is_fixed_size_binary(column.type.value_type):
        raise ShardCorruptError(f"{path}: the part has no signature list; run the build again", path=str(path))
    first, last = column.offsets[0].as_py(), column.offsets[1].as_py()
    values = column.values
    width = 4 * hashes
    buf = values.buffers()[1]
    if buf is None or last == first:
        return np.zeros((0, hashes), np.uint32)
    if values.type.byte_width != width:
        raise ShardCorruptError(f"{path}: signatures of {values.type.byte_width} bytes, not {width}", path=str(path))
    start = (values.offset + first) * width
    raw = np.frombuffer(buf, np.uint8)[start : start + (last - first) * width]
    return raw.view("<u4").reshape(-1, hashes)


# -- resolve: in the driver, over the confirmed pairs only -------------------------------------------


def resolve_pairs(scheme: Scheme) -> int:
    """Phase resolve: walk the confirmed pairs in corpus order of their later document; drop it
    when one of its earlier documents is kept. Writes the dropped ones; returns their number."""
    found = [_open(_path(scheme, "pairs", p)).read_all() for p in range(scheme.partitions)]
    table = pa.concat_tables(found)
    pairs = np.stack([table.column("earlier").to_numpy(), table.column("later").to_numpy()], axis=1)
    pairs = np.unique(pairs.reshape(-1, 2), axis=0)
    pairs = pairs[np.lexsort((pairs[:, 0], pairs[:, 1]))]
    dropped: set[int] = set()
    later = pairs[:, 1]
    starts, ends = _runs(later)
    for a, b in zip(starts.tolist(), ends.tolist(), strict=True):  # one step per near-copy
        if any(j not in dropped for j in pairs[a:b, 0].tolist()):
            dropped.add(int(later[a]))
    ids = np.fromiter(sorted(dropped), np.int64, count=len(dropped))
    _write(_path(scheme, "near-drops", 0), _PLACES, _places(ids))
    return len(ids)


# -- finish: a task per part -------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Finished:
    """A part's figures: documents dropped as exact and (besides those) as near duplicates,
    whether it has a drop list, and (overlap) whether it is a held-out part."""

    exact: int
    near: int
    has_drops: bool
    held: bool = False


def _rows_of(path: Path, number: int) -> np.ndarray:
    """The rows of part ``number`` in a (part, row) file sorted by part."""
    table = _open(path).read_all()
    parts = table.column("part").to_numpy()
    a, b = np.searchsorted(parts, [number, number + 1])
    return np.asarray(table.column("row").to_numpy()[a:b], np.int64)


def _found(scheme: Scheme, number: int) -> tuple[np.ndarray, np.ndarray]:
    """The part's exact drops and near drops (rows), from every partition's files."""
    exact = [np.zeros(0, np.int64)]
    near = [np.zeros(0, np.int64)]
    for p in range(scheme.partitions):
        if scheme.exact:
            exact.append(_rows_of(_path(scheme, "exact-drops", p), number))
        if scheme.near is not None:
            near.append(_rows_of(_path(scheme, "repeats", p), number))
    if scheme.near is not None:
        near.append(_rows_of(_path(scheme, "near-drops", 0), number))
    return np.unique(np.concatenate(exact)), np.unique(np.concatenate(near))


def finish_part(task: PartTask) -> Finished:
    """Phase finish: the part's drop list in one file; with the overlap check, its hashes
    (held-out part: kept documents; other parts: kept train documents) partitioned by hash."""
    scheme, n = task.scheme, task.number
    exact, near = _found(scheme, n)
    dropped = np.union1d(exact, near)
    if len(dropped):
        _write(_path(scheme, "drops", n), _PLACES, _places(_ids(np.full(len(dropped), n), dropped)))
    held = (task.fixed or 0) > 0
    if scheme.splits is not None:
        table = read_part_docs(scheme.cache_dir, task.key)
        hashes = fixed16(table, "hash")
        keep = np.ones(len(hashes), bool)
        keep[dropped] = False
        chosen = keep if held else assign_splits(scheme.splits, hashes, keep, task.fixed) == 0
        rows = np.flatnonzero(chosen)
        where = (np.ascontiguousarray(hashes[rows, :8]).view("<u8").ravel() % np.uint64(scheme.partitions)).astype(
            np.int64
        )
        columns = {"key": _binary(hashes[rows]), "row": pa.array(rows.astype(np.int32))}
        _write_partitioned(_path(scheme, "held" if held else "train", n), columns, where, scheme.partitions)
    return Finished(len(exact), len(dropped) - len(exact), bool(len(dropped)), held)


def overlap_partition(task: PartitionTask) -> int:
    """Phase overlap for one partition: the kept train documents whose content a held-out part
    also holds, into this partition's file; returns how many."""
    scheme, p = task.scheme, task.partition
    held_keys: list[np.ndarray] = [np.zeros((0, 16), np.uint8)]
    train: list[tuple[int, pa.RecordBatch]] = []
    for n in range(scheme.parts):
        held = _path(scheme, "held", n)
        if held.is_file():
            held_keys.append(_rows(_batch(held, p).column("key"), 16).copy())
        else:
            train.append((n, _batch(_path(scheme, "train", n), p)))
    known = np.unique(np.ascontiguousarray(np.concatenate(held_keys)).view("V16").reshape(-1))
    hits = [np.zeros(0, np.int64)]
    for n, batch in train:
        keys = np.ascontiguousarray(_rows(batch.column("key"), 16)).view("V16").reshape(-1)
        rows = batch.column("row").to_numpy()[np.isin(keys, known)]
        hits.append(_ids(np.full(len(rows), n), rows))
    found = np.concatenate(hits)
    _write(_path(scheme, "overlap", p), _PLACES, _places(found))
    return len(found)


# -- count and encode tasks that read their drop list ------------------------------------------------


@dataclass(frozen=True, slots=True)
class Masked:
    """A count or encode task (``keep`` unset) and where its part's drop list is."""

    task: Any
    number: int
    documents: int
    files: tuple[str, ...]  # (part, row) files sorted by part; this part's rows are dropped


def keep_mask(files: Sequence[str], number: int, documents: int) -> np.ndarray:
    """Bool per document of part ``number``: False where one of ``files`` lists it."""
    keep = np.ones(documents, bool)
    for name in files:
        keep[_rows_of(Path(name), number)] = False
    return keep


def _unmasked(masked: Masked) -> Any:
    return dataclasses.replace(masked.task, keep=keep_mask(masked.files, masked.number, masked.documents))


def masked_count(masked: Masked) -> tuple[pa.Table, int]:
    """ingest.count_part with the part's drop list read from its files."""
    return count_part(_unmasked(masked))


def masked_encode(masked: Masked) -> dict[str, dict[str, int]]:
    """ingest.encode_part with the part's drop list read from its files."""
    return encode_part(_unmasked(masked))


def reset(work_dir: str, keys: Sequence[str]) -> None:
    """An empty work directory holding the list of parts' cache keys (the group tasks read it)."""
    shutil.rmtree(work_dir, ignore_errors=True)
    Path(work_dir).mkdir(parents=True)
    (Path(work_dir) / "parts.json").write_text(json.dumps(list(keys)))


def drop_list(scheme: Scheme, number: int) -> str:
    return str(_path(scheme, "drops", number))


def overlap_lists(scheme: Scheme) -> tuple[str, ...]:
    return tuple(str(_path(scheme, "overlap", p)) for p in range(scheme.partitions))
