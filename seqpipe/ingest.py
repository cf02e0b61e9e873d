"""Build tasks that run on executor workers: ingest a part, count it, encode it, write a shard.

Every task is a top-level function taking one small picklable task object and returning small
metadata. Each writes its output atomically under a deterministic name, so a task that runs
twice (a retried cluster task, a resumed build) produces the same bytes and never a torn file.

A part is a run of consecutive small inputs of one source (read one after another) or one cut
of a large input: per-part costs (a task, a cache entry) are paid per ``part_bytes``, not per file.

Ingest output ("part", cached by a fingerprint of its inputs, see ``part_key``)::

    <cache>/parts/<key>/part.arrow    one row, one list column per array: the documents' columns
                                      (hash, dedupe, pieces, bytes, characters, words, member:
                                      which of the part's inputs holds it), ``keys`` (the distinct
                                      piece keys) and ``codes`` (one code per piece position,
                                      documents in order, in the smallest unsigned type that
                                      holds the part's key count)
    <cache>/parts/<key>/counts.<splits>.arrow   the part's train piece counts (key, count, first
                                      within the part), when its ingest task counted it
    <cache>/parts/<key>/meta.json     read/clean statistics and the hashes of the files above

One Arrow file, not one per array: a cache of many small parts costs files and opens per part.
Parts are rebuilt after a crash, so they are written without fsync (only renamed into place).
"""

from __future__ import annotations

import itertools
import json
import os
import shutil
import threading
import uuid
from collections import deque
from collections.abc import Iterable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Final, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import xxhash

from seqpipe._environment import part_environment
from seqpipe._hashing import hash_array, hash_file, hash_json
from seqpipe._parse import to_plain
from seqpipe.errors import PatternTimeoutError, SeqpipeError, ShardCorruptError, SourceError
from seqpipe.filesystem import change_stamp
from seqpipe.recipe import Recipe
from seqpipe.shards import fsync_file, id_dtype, read_shard, read_table, write_shard, write_table
from seqpipe.splits import assign_splits, fixed_split_of
from seqpipe.tokenizers.base import Encoder, Segments
from seqpipe.tokenizers.words import count_words

PART_FORMAT: Final = "seqpipe.part/7"  # /7: near_dedupe signatures from 32-bit word and shingle hashes
_THREADS: list[int] = []  # set by set_ingest_threads (e.g. in pool workers); else the environment


def set_ingest_threads(n: int) -> None:
    """Threads each ingest task uses (pool workers get cores // workers)."""
    _THREADS[:] = [max(1, int(n))]


def ingest_threads() -> int:
    if _THREADS:
        return _THREADS[0]
    return max(1, int(os.environ.get("SEQPIPE_INGEST_THREADS", "2")))


HASH_TYPE: Final = pa.binary(16)


# -- ingest ------------------------------------------------------------------------------------------


def part_key(recipe: Recipe, source_index: int, members: Sequence[tuple[str, Any]]) -> str:
    """Fingerprint of everything an ingested part depends on (not vocab, splits or shards):
    ``members`` gives each of its inputs' hash and the source's part of it, in reading order."""
    from seqpipe.sources.base import Part

    return hash_json(
        {
            "format": PART_FORMAT,
            "source": to_plain(recipe.sources[source_index]),
            # the common start/stop kind inline: a part of many small files lists each
            "members": [[h, [p.start, p.stop] if type(p) is Part else _plain_part(p)] for h, p in members],
            "clean": [to_plain(s) for s in recipe.clean],
            "tokenizer": to_plain(recipe.tokenizer),
            # Unicode tables and the libraries that apply them: an upgrade must not reuse parts
            "environment": part_environment(),
        }
    )


def _plain_part(part: Any) -> Any:
    """A source's part as JSON (the common start/stop kind directly: a key may list many)."""
    from seqpipe.sources.base import Part

    if type(part) is Part:
        return [part.start, part.stop]
    return to_plain(part) if hasattr(part, "__dataclass_fields__") else repr(part)


class Member(NamedTuple):
    """One input's share of a part: the whole of a small file, or one cut of a large one. A
    named tuple, not a dataclass: a plan of many small files makes one per input, and a tuple
    is made in a fraction of a frozen dataclass's time."""

    input_index: int  # index into the manifest's inputs
    path: str
    part: Any  # the source's Part
    # the input's change stamp when its hash was taken (filesystem.change_stamp); a part read
    # while the stamp differs is refused, never cached
    stamp: tuple[int, ...] | None = None


@dataclass(frozen=True)
class IngestTask:
    recipe: Recipe
    source_index: int
    members: tuple[Member, ...]  # read in this order; every document keeps its member's index
    key: str
    cache_dir: str
    batch_bytes: int = 1 << 20
    threads: int | None = None  # ingest threads; None: ingest_threads()
    # corpus position of the part: when set (no dedupe step, so every document is kept), the
    # task also counts the part's train pieces while they are in memory (see PartMeta.counts)
    count_order: int | None = None


@dataclass
class PartMeta:
    """What an ingested part reports back (also stored as meta.json)."""

    key: str
    documents: int = 0
    pieces: int = 0
    read: dict[str, int] = field(default_factory=dict)
    dropped: dict[str, int] = field(default_factory=dict)
    # matches replaced by placeholder tokens, by target (redact steps)
    redacted: dict[str, int] = field(default_factory=dict)
    reused: bool = False
    # XXH3-128 of each file of the cached part, checked before the part is reused
    files: dict[str, str] | None = None
    # what count_part would return for this part, when the ingest task counted it (not stored)
    counts: tuple[pa.Table, int] | None = field(default=None, compare=False, repr=False)


def _doc_hashes(docs: pa.Array) -> np.ndarray:
    """XXH3-128 of each document's UTF-8 bytes, as an (n, 16) uint8 array (one C call per doc)."""
    arr = docs.cast(pa.large_string())
    offsets = np.frombuffer(arr.buffers()[1], dtype=np.int64)[arr.offset : arr.offset + len(arr) + 1]
    data = arr.buffers()[2]
    view = memoryview(data) if data is not None else memoryview(b"")
    digest = xxhash.xxh3_128_digest
    bounds = offsets.tolist()
    joined = b"".join([digest(view[a:b]) for a, b in itertools.pairwise(bounds)])
    return np.frombuffer(joined, dtype=np.uint8).reshape(-1, 16)


BLANK_DOCUMENT_RE2: Final = r"^[ \t\x0b\x0c\r\n]*$"  # the blank set of sources.base.is_blank
BLANK_AFTER_CLEANING: Final = "blank_after_cleaning"  # the summary.dropped key of such documents


@dataclass(slots=True)
class _Cleaned:
    """A batch as the cleaning steps leave it: the documents, each survivor's index in the batch as
    read, and (with a dedupe / near_dedupe step) its hash / MinHash signature as it was at that step."""

    docs: pa.Array
    positions: np.ndarray
    dedupe: np.ndarray | None = None
    near: np.ndarray | None = None

    def keep(self, mask: np.ndarray) -> None:
        """Keep the documents where ``mask`` is True, with everything known about them."""
        self.docs = self.docs.filter(pa.array(mask))
        self.positions = self.positions[mask]
        if self.dedupe is not None:
            self.dedupe = self.dedupe[mask]
        if self.near is not None:
            self.near = self.near[mask]


def _clean(recipe: Recipe, docs: pa.Array, dropped: dict[str, int], redacted: dict[str, int]) -> _Cleaned:
    """Run the cleaning steps in order. Steps that count what they replaced (``apply_counted``)
    add their counts to ``redacted``; documents a step drops are counted in ``dropped``."""
    out = _Cleaned(docs, np.arange(len(docs), dtype=np.int64))
    masks: dict[int, np.ndarray] = {}  # step index -> its keep mask, for each run of keep() steps
    for i, step in enumerate(recipe.clean):
        name = f"{i}:{step.kind}"
        if i in masks:  # measured with the run of keep() steps it belongs to
            continue
        if getattr(step, "keep", None) is not None:
            masks = _keep_masks(recipe.clean, i, out.docs)
            out.keep(_count_first_failures(recipe.clean, masks, dropped))
            continue
        if getattr(step, "is_dedupe", False):
            out.dedupe = _doc_hashes(out.docs)
            continue
        if getattr(step, "is_near_dedupe", False):
            out.near = step.signatures(out.docs)  # type: ignore[attr-defined]
            continue
        before = len(out.docs)
        if (counted := getattr(step, "apply_counted", None)) is not None:
            out.docs, counts = counted(out.docs)
            for target, n in counts.items():
                redacted[target] = redacted.get(target, 0) + n
        else:
            try:
                out.docs = step.apply(out.docs)
            except PatternTimeoutError as exc:
                raise _renumbered(exc, f"clean[{i}] {step.kind}", out.positions) from None
            if len(out.docs) != before and (out.dedupe is not None or out.near is not None):
                raise SeqpipeError(f"clean step {name} drops documents but exposes no keep() mask")
        if len(out.docs) != before:
            dropped[name] = dropped.get(name, 0) + before - len(out.docs)
    if recipe.clean and len(out.docs):
        # Cleaning that leaves nothing but blanks drops the document (the rule readers apply),
        # so no document becomes an end marker alone.
        kept = pc.invert(pc.match_substring_regex(out.docs, BLANK_DOCUMENT_RE2)).to_numpy(zero_copy_only=False)
        if not kept.all():
            dropped[BLANK_AFTER_CLEANING] = dropped.get(BLANK_AFTER_CLEANING, 0) + int((~kept).sum())
            out.keep(kept)
    return out


def _keep_masks(steps: Sequence[Any], start: int, docs: pa.Array) -> dict[int, np.ndarray]:
    """The keep masks of the run of steps with a ``keep`` mask from ``start`` on, all measured on
    the same documents: each such step judges a document by its own text alone, so running the
    run in order keeps exactly the documents every mask keeps, and measuring all of them on one
    array lets them share its cut into words (see clean._quality.words)."""
    masks: dict[int, np.ndarray] = {}
    for j in range(start, len(steps)):
        keep_fn = getattr(steps[j], "keep", None)
        if keep_fn is None:
            break
        masks[j] = np.asarray(keep_fn(docs), dtype=bool)
    return masks


def _count_first_failures(steps: Sequence[Any], masks: dict[int, np.ndarray], dropped: dict[str, int]) -> np.ndarray:
    """The documents a run of keep() steps keeps; each step's drops (the documents it fails that
    every earlier step of the run kept, as when the steps run one after another) go to ``dropped``."""
    alive = np.ones(len(next(iter(masks.values()))), dtype=bool)
    for j, mask in masks.items():
        n = int((alive & ~mask).sum())
        if n:
            name = f"{j}:{steps[j].kind}"
            dropped[name] = dropped.get(name, 0) + n
        alive &= mask
    return alive


def _renumbered(exc: PatternTimeoutError, step: str, positions: np.ndarray, first: int = 0) -> PatternTimeoutError:
    """``exc`` with its document counted among the documents as read (``positions`` maps the
    step's batch to the read batch, whose first document is number ``first``)."""
    document = first + int(positions[exc.document])
    message = exc.message.replace(f"{exc.step}:", f"{step}:", 1).replace(
        f"on document {exc.document} ", f"on document {document} ", 1
    )
    return PatternTimeoutError(message, step=step, pattern=exc.pattern, document=document)


def _merge_segments(parts: Sequence[Segments]) -> Segments:
    """One dictionary for several batches' segments (vectorized remap of codes)."""
    if len(parts) == 1:
        return parts[0]
    if not parts:
        return Segments(pa.array([], pa.binary()), np.zeros(0, np.int32), np.zeros(0, np.int64))
    all_keys = pa.concat_arrays([p.keys.cast(pa.binary()) for p in parts])
    enc = pc.dictionary_encode(all_keys)
    remap = enc.indices.to_numpy(zero_copy_only=False).astype(np.int32, copy=False)
    codes = np.empty(sum(len(p.codes) for p in parts), dtype=np.int32)
    key_at = pos = 0
    for p in parts:  # batch-local code -> global code, written straight into the output
        np.take(remap[key_at : key_at + len(p.keys)], p.codes, out=codes[pos : pos + len(p.codes)], mode="clip")
        key_at += len(p.keys)
        pos += len(p.codes)
    lengths = np.concatenate([p.doc_lengths for p in parts])
    return Segments(enc.dictionary.cast(pa.binary()), codes, lengths)


PART_FILE: Final = "part.arrow"
COUNT_SLICE: Final = 1 << 20  # ids per np.bincount call when a shard task counts its ids


def _part_dir(cache_dir: str, key: str) -> Path:
    return Path(cache_dir) / "parts" / key


def part_intact(cache_dir: str, meta: PartMeta) -> bool:
    """Whether every file of a cached part still has the hash it was written with (a part
    stored without hashes is not trusted)."""
    if meta.files is None or PART_FILE not in meta.files:
        return False
    part = _part_dir(cache_dir, meta.key)
    try:
        return all(hash_file(part / name) == digest for name, digest in meta.files.items())
    except OSError:
        return False


def load_part_meta(cache_dir: str, key: str) -> PartMeta | None:
    """The meta of a complete cached part, or None."""
    meta = _part_dir(cache_dir, key) / "meta.json"
    try:
        data = json.loads(meta.read_text())
        return PartMeta(**data)
    except (OSError, ValueError, TypeError):
        return None


@dataclass
class _Batch:
    segments: Segments | None
    columns: dict[str, np.ndarray]
    dropped: dict[str, int]
    redacted: dict[str, int]


def _process_batch(recipe: Recipe, batch: pa.Array, first: int = 0) -> _Batch:
    """Clean, segment and describe one batch of documents (runs on an ingest thread); the
    batch's first document is document ``first`` of the part (for error messages)."""
    dropped: dict[str, int] = {}
    redacted: dict[str, int] = {}
    try:
        cleaned = _clean(recipe, batch, dropped, redacted)
    except PatternTimeoutError as exc:
        raise _renumbered(exc, exc.step, np.arange(len(batch)), first) from None
    docs, dedupe, near, positions = cleaned.docs, cleaned.dedupe, cleaned.near, cleaned.positions
    if len(docs) == 0:
        return _Batch(None, {}, dropped, redacted)
    docs = docs.cast(pa.large_string())
    columns = {
        "hash": _doc_hashes(docs),
        "bytes": pc.binary_length(docs).to_numpy(zero_copy_only=False).astype(np.int64),
        "characters": pc.utf8_length(docs).to_numpy(zero_copy_only=False).astype(np.int64),
        "words": count_words(docs),
        "position": first + positions,  # index among the part's documents as read
    }
    try:
        segments = recipe.tokenizer.segment(docs)
    except PatternTimeoutError as exc:
        raise _renumbered(exc, exc.step, positions, first) from None
    if dedupe is not None:
        columns["dedupe"] = dedupe
    if near is not None:
        columns["near"] = near
    return _Batch(segments, columns, dropped, redacted)


def _processed(recipe: Recipe, batches: Iterator[pa.Array], threads: int) -> Iterator[_Batch]:
    """Each batch cleaned and segmented, in reading order.

    Batches are cleaned and segmented on a few threads (Arrow and numpy release the GIL) while
    this thread reads on. With one thread, batches are processed inline: a worker given one
    core uses one core."""
    first = 0
    if threads == 1:
        for batch in batches:
            yield _process_batch(recipe, batch, first)
            first += len(batch)
        return
    with ThreadPoolExecutor(max_workers=threads) as pool:
        pending: deque[Future[_Batch]] = deque()
        for batch in batches:
            pending.append(pool.submit(_process_batch, recipe, batch, first))
            first += len(batch)
            while len(pending) > threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


@dataclass(frozen=True, slots=True)
class _Gathered:
    """A part's processed batches joined: one dictionary of pieces, per-document columns, drops."""

    segments: Segments
    columns: dict[str, np.ndarray]
    dropped: dict[str, int]
    redacted: dict[str, int]


def _gather(done: Iterable[_Batch]) -> _Gathered:
    dropped: dict[str, int] = {}
    redacted: dict[str, int] = {}
    segs: list[Segments] = []
    names = ("hash", "dedupe", "near", "bytes", "characters", "words", "position")
    columns: dict[str, list[np.ndarray]] = {k: [] for k in names}
    for batch in done:
        for name, count in batch.dropped.items():
            dropped[name] = dropped.get(name, 0) + count
        for name, count in batch.redacted.items():
            redacted[name] = redacted.get(name, 0) + count
        if batch.segments is None:
            continue
        segs.append(batch.segments)
        for name, values in batch.columns.items():
            columns[name].append(values)
    widths = {"hash": 16, "dedupe": 16}  # (n, 16) hashes; the others one value per document
    joined = {name: _joined(parts, widths.get(name)) for name, parts in columns.items()}
    return _Gathered(_merge_segments(segs), joined, dropped, redacted)


def _joined(parts: list[np.ndarray], width: int | None) -> np.ndarray:
    if parts:
        return np.concatenate(parts)
    return np.zeros((0, width), np.uint8) if width else np.zeros(0, np.int64)


def _docs_table(recipe: Recipe, got: _Gathered, member: np.ndarray) -> dict[str, pa.Array]:
    """The part's documents columns: per document its hash, pieces, bytes, characters, words, the
    member (of the part's inputs) it comes from (and dedupe hash, MinHash signature)."""
    n = len(got.segments.doc_lengths)
    table: dict[str, Any] = {
        "hash": pa.FixedSizeBinaryArray.from_buffers(HASH_TYPE, n, [None, pa.py_buffer(got.columns["hash"].tobytes())]),
        "pieces": pa.array(got.segments.doc_lengths, pa.int64()),
        "bytes": pa.array(got.columns["bytes"], pa.int64()),
        "characters": pa.array(got.columns["characters"], pa.int64()),
        "words": pa.array(got.columns["words"], pa.int64()),
        "member": pa.array(member, pa.int32()),
    }
    if any(getattr(s, "is_dedupe", False) for s in recipe.clean):
        table["dedupe"] = pa.FixedSizeBinaryArray.from_buffers(
            HASH_TYPE, n, [None, pa.py_buffer(got.columns["dedupe"].tobytes())]
        )
    for step in recipe.clean:
        if getattr(step, "is_near_dedupe", False):  # signatures: bands * rows uint32 per document
            width = 4 * int(step.hashes)  # type: ignore[attr-defined]
            near = got.columns["near"].astype("<u4", copy=False)
            table["near"] = pa.FixedSizeBinaryArray.from_buffers(
                pa.binary(width), n, [None, pa.py_buffer(np.ascontiguousarray(near) if n else b"")]
            )
    return table


def ingest_part(task: IngestTask) -> PartMeta:
    """Read one part (its inputs one after another), clean it, segment it, and store it in the cache."""
    from seqpipe.sources.base import ReadStats

    recipe = task.recipe
    stats = ReadStats()
    read_counts: list[int] = []  # documents read from each member so far, in member order
    batches = _read_members(recipe.sources[task.source_index], task, stats, read_counts)
    try:
        got = _gather(_processed(recipe, batches, task.threads or ingest_threads()))
    except PatternTimeoutError as exc:
        raise _in_member(exc, task, read_counts) from None
    seg = got.segments
    keys = seg.keys.cast(pa.binary())
    ends = np.cumsum(np.asarray(read_counts, np.int64))
    member = np.searchsorted(ends, got.columns["position"], side="right").astype(np.int32)
    meta = PartMeta(
        key=task.key,
        documents=len(seg.doc_lengths),
        pieces=len(seg.codes),
        read={k: int(v) for k, v in asdict(stats).items()},
        dropped=got.dropped,
        redacted=got.redacted,
    )
    for m in task.members:
        _check_unchanged(m)
    counted = None
    if task.count_order is not None:
        fixed = fixed_split_of(recipe.sources[task.source_index])
        counted = _count(recipe, got.columns["hash"], seg.doc_lengths, keys, seg.codes, None, 0, fixed)
    stored = _stored_codes(seg.codes, len(keys))
    _store_part(task, _docs_table(recipe, got, member), keys, stored, meta, counted)
    if counted is not None and task.count_order is not None:
        meta.counts = (_in_corpus_order(counted[0], task.count_order), counted[1])
    return meta


def counts_file(recipe: Recipe) -> str:
    """The name of a part's stored counts under ``recipe``'s splits: the train split is all
    they depend on besides the part (a rebuild that changes only the vocabulary reuses them)."""
    return f"counts.{hash_json(to_plain(recipe.splits))[:16]}.arrow"


def _in_corpus_order(table: pa.Table, order: int) -> pa.Table:
    """A part's count table (``first``: the position within the part) with ``first`` ranked in
    the corpus (the part's position in the upper bits)."""
    first = pa.array(table.column("first").to_numpy() + (np.int64(order) << 40), pa.int64())
    return table.set_column(table.schema.get_field_index("first"), "first", first)


def _read_members(source: Any, task: IngestTask, stats: Any, read_counts: list[int]) -> Iterator[pa.Array]:
    """The documents of each member in turn (``Source.read_many``, which appends each member's
    document count to ``read_counts``), small batches of consecutive members joined into
    batches of about ``batch_bytes``: a batch per small file would cost a cleaning and a
    segmenting call per file."""
    held: list[pa.Array] = []
    held_bytes = 0
    parts = [(m.path, m.part) for m in task.members]
    for batch in source.read_many(parts, stats, read_counts, batch_bytes=task.batch_bytes):
        held.append(batch)
        held_bytes += batch.nbytes
        if held_bytes >= task.batch_bytes:
            yield _joined_batches(held)
            held, held_bytes = [], 0
    if held:
        yield _joined_batches(held)


def _joined_batches(arrays: list[pa.Array]) -> pa.Array:
    return arrays[0] if len(arrays) == 1 else pa.concat_arrays(arrays)


def _in_member(exc: PatternTimeoutError, task: IngestTask, read_counts: list[int]) -> PatternTimeoutError:
    """``exc`` (its document counted among the part's documents as read) naming the member file
    that holds the document, and the document's number within that file's part."""
    ends = np.cumsum(np.asarray(read_counts, np.int64))
    at = int(np.searchsorted(ends, exc.document, side="right"))
    at = min(at, len(task.members) - 1)  # a member still being read when the pattern ran over
    document = exc.document - (int(ends[at - 1]) if at else 0)
    m = task.members[at]
    # a part's start: a byte offset (text, JSON Lines) or a row group / record batch index
    where = m.path + (f" (the part starting at {m.part.start})" if m.part.start else "")
    message = exc.message.replace(f"on document {exc.document} ", f"on document {document} ", 1)
    return PatternTimeoutError(f"{where}: {message}", step=exc.step, pattern=exc.pattern, document=document)


def _check_unchanged(member: Member) -> None:
    """Refuse a part whose input changed since its hash was taken: what was read may not be
    what the hash (and so the manifest and the cache key) says."""
    if member.stamp is None:
        return
    now = change_stamp(member.path)
    if now is None or tuple(now) != member.stamp:
        raise SourceError(
            member.path,
            "changed while the build was reading it (size or modification time differ from when it "
            "was hashed); run the build again once the file no longer changes",
        )


def _store_part(
    task: IngestTask,
    docs: dict[str, pa.Array],
    keys: pa.Array,
    codes: pa.Array,
    meta: PartMeta,
    counted: tuple[pa.Table, int] | None = None,
) -> None:
    """Write the part into the cache atomically: a private directory renamed into place (a twin
    task that finished first wins; a torn leftover is replaced). No fsync: a part lost to a
    crash is found missing or failing its hash, and ingested again."""
    final = _part_dir(task.cache_dir, task.key)
    tmp = final.with_name(f".{task.key}.{os.getpid()}.{uuid.uuid4().hex[:8]}.tmp")
    tmp.mkdir(parents=True)
    try:
        columns = {**docs, "keys": keys, "codes": codes}
        row = {name: pa.LargeListArray.from_arrays(pa.array([0, len(a)], pa.int64()), a) for name, a in columns.items()}
        write_table(tmp / PART_FILE, pa.table(row), durable=False)
        names = [PART_FILE]
        if counted is not None:  # the ingest task counted every document: keep them for rebuilds
            names.append(counts_file(task.recipe))
            table = counted[0].replace_schema_metadata({"train_documents": str(counted[1])})
            write_table(tmp / names[-1], table, durable=False)
        meta.files = {name: hash_file(tmp / name) for name in names}
        (tmp / "meta.json").write_text(json.dumps(asdict(meta), sort_keys=True))
        try:
            os.rename(tmp, final)
        except OSError:
            if load_part_meta(task.cache_dir, task.key) is None:  # not a finished twin: replace it
                shutil.rmtree(final, ignore_errors=True)
                os.rename(tmp, final)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _read_part(cache_dir: str, key: str) -> tuple[pa.Table, pa.Array, np.ndarray]:
    """A cached part: its documents table, its distinct piece keys, and its piece codes."""
    row = read_table(_part_dir(cache_dir, key) / PART_FILE)
    # a column of the one-row file is one chunk: combine_chunks would copy it (the near signatures: 15 MB a part)
    values = {name: _one_chunk(row.column(name)).flatten() for name in row.column_names}
    keys = values.pop("keys")
    codes = values.pop("codes").to_numpy(zero_copy_only=False)
    return pa.table(values), keys, codes


def part_file(cache_dir: str, key: str) -> Path:
    """Where a cached part's one file is (its documents table is read_part_docs')."""
    return _part_dir(cache_dir, key) / PART_FILE


def _one_chunk(column: pa.ChunkedArray) -> pa.Array:
    return column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()


def _stored_codes(codes: np.ndarray, n_keys: int) -> pa.Array:
    """A part's piece codes as stored: in the smallest unsigned type that holds ``n_keys``
    values, as shard ids are (a 16 MB part of English-like text has some 40,000 distinct
    words, so two bytes: half the bytes the cache writes and the encode tasks read back)."""
    return pa.array(codes.astype(id_dtype(n_keys), copy=False))


def signature_rows(table: pa.Table, hashes: int) -> np.ndarray:
    """The ``near`` column of a part's docs table as an (n, hashes) uint32 array."""
    col = table.column("near").combine_chunks()
    buf = col.buffers()[1]
    if buf is None or len(col) == 0:
        return np.zeros((0, hashes), np.uint32)
    width = 4 * hashes
    raw = np.frombuffer(buf, dtype=np.uint8)[col.offset * width : (col.offset + len(col)) * width]
    return raw.view("<u4").reshape(-1, hashes).astype(np.uint32)


def read_part_docs(cache_dir: str, key: str) -> pa.Table:
    """A cached part's documents table (one row per document, see the module docstring)."""
    return _read_part(cache_dir, key)[0]


def _piece_mask(pieces: np.ndarray, doc_mask: np.ndarray) -> np.ndarray:
    return np.repeat(doc_mask, pieces)


def fixed16(table: pa.Table, name: str) -> np.ndarray:
    """A fixed_size_binary(16) column as an (n, 16) uint8 view."""
    col = table.column(name).combine_chunks()
    buf = col.buffers()[1]
    if buf is None or len(col) == 0:
        return np.zeros((0, 16), np.uint8)
    return np.frombuffer(buf, dtype=np.uint8)[col.offset * 16 : (col.offset + len(col)) * 16].reshape(-1, 16)


# -- counting ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CountTask:
    cache_dir: str
    key: str
    order: int  # corpus position of this part, for first-occurrence ranks
    recipe: Recipe
    keep: np.ndarray | None  # bool per document (None: no dedupe step, keep all)
    fixed: int | None = None  # the split of every document, for a source with a fixed split


def count_part(task: CountTask) -> tuple[pa.Table, int]:
    """Piece counts over the part's train documents: table (key, count, first), and how many
    train documents there are."""
    if task.keep is None:
        stored = _stored_counts(task)
        if stored is not None:
            return stored
    docs, keys, codes = _read_part(task.cache_dir, task.key)
    return _count(
        task.recipe,
        fixed16(docs, "hash"),
        docs.column("pieces").to_numpy(),
        keys,
        codes,
        task.keep,
        task.order,
        task.fixed,
    )


def _stored_counts(task: CountTask) -> tuple[pa.Table, int] | None:
    """The counts the part's ingest task stored for these splits (its hash was checked with the
    part's), when it stored them."""
    path = _part_dir(task.cache_dir, task.key) / counts_file(task.recipe)
    if not path.is_file():
        return None
    table = read_table(path, full=True)
    train = int((table.schema.metadata or {}).get(b"train_documents", b"-1"))
    if train < 0:
        return None
    return _in_corpus_order(table.replace_schema_metadata(None), task.order), train


def _count(
    recipe: Recipe,
    hashes: np.ndarray,
    pieces: np.ndarray,
    keys: pa.Array,
    codes: np.ndarray,
    keep: np.ndarray | None,
    order: int,
    fixed: int | None = None,
) -> tuple[pa.Table, int]:
    """count_part's result from a part's arrays (document hashes, pieces per document, distinct
    keys, one code per piece)."""
    train = assign_splits(recipe.splits, hashes, keep, fixed) == 0
    sel = codes[_piece_mask(pieces, train)] if len(codes) else codes
    counts = np.bincount(sel, minlength=len(keys)).astype(np.int64)
    present = np.flatnonzero(counts)
    # Arrow's hash-based unique keeps first-occurrence order (O(n), unlike a sort)
    seen_order = pc.unique(pa.array(sel, pa.int32())).to_numpy(zero_copy_only=False)
    first = np.zeros(len(keys), np.int64)
    first[seen_order] = np.arange(len(seen_order), dtype=np.int64)
    table = pa.table(
        {
            "key": keys.take(pa.array(present)),
            "count": pa.array(counts[present], pa.int64()),
            "first": pa.array((np.int64(order) << 40) + first[present], pa.int64()),
        }
    )
    return table, int(train.sum())


# -- encoding ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class EncodeTask:
    cache_dir: str
    key: str
    stage_dir: str
    recipe: Recipe
    number: int  # part number, names the output files
    inputs: tuple[int, ...]  # the input index of each of the part's members (the documents tables' "input")
    keep: np.ndarray | None  # bool per document (None: keep all)
    dtype: str
    fixed: int | None = None  # the split of every document, for a source with a fixed split
    # the task runs in the driver's process: it may hand its output to the shard phase in memory
    hold: bool = False


_ENCODERS: dict[str, Encoder] = {}


def _encoder(recipe: Recipe, stage_dir: str) -> Encoder:
    enc = _ENCODERS.get(stage_dir)
    if enc is None:
        enc = recipe.tokenizer.load(Path(stage_dir))
        _ENCODERS.clear()
        _ENCODERS[stage_dir] = enc
    return enc


def train_id_counts(recipe: Recipe, stage_dir: str, counts: pa.Table, documents: int, vocab_size: int) -> np.ndarray:
    """How often each id occurs in the train split's shards, from the corpus's train piece counts
    (``key``, ``count``) and its number of train documents, without reading an id: encode_part
    writes every piece as its ``piece_ids`` run wherever the piece occurs, so an id occurs the
    sum over keys of the key's count times the id's occurrences in the key's run, plus once per
    train document for each begin/end marker the recipe adds. Equal to a bincount of the train
    shards when the counts are of the documents encoded (the same drop lists and splits)."""
    enc = _encoder(recipe, stage_dir)
    values, offsets = enc.piece_ids(counts.column("key").combine_chunks())
    out = np.zeros(vocab_size, np.int64)
    np.add.at(out, values, np.repeat(counts.column("count").to_numpy().astype(np.int64), np.diff(offsets)))
    for marker in _markers(recipe, enc):
        if marker is not None:
            out[marker] += documents
    return out


def _markers(recipe: Recipe, enc: Encoder) -> tuple[int | None, int | None]:
    """The begin and end ids encode_part puts around each document (None: not added)."""
    voc = enc.vocabulary
    begin = voc.id_of("begin") if recipe.encode.prepend_begin else None
    end = voc.id_of("end") if recipe.encode.append_end else None
    return begin, end


def encoded_dir(stage_dir: str) -> Path:
    """Where encode tasks write (removed once the shards are written)."""
    return Path(stage_dir) / "encoded"


def encoded_path(stage_dir: str, number: int, split: str) -> Path:
    return encoded_dir(stage_dir) / f"{number:06d}.{split}.arrow"


def fragment_path(stage_dir: str, number: int, split: str) -> Path:
    return encoded_dir(stage_dir) / f"{number:06d}.{split}.docs.arrow"


# An encode task that runs in the driver's process (its thread pool) hands its ids and document
# fragment to the shard phase in memory, under the file name it would otherwise write and the
# shard phase read back; the rest go through files. Bounded in all, so the driver's memory does
# not grow with the corpus: past the bound, files again. The bound is small (a corpus of
# 100 MB of words already has more encoded ids than this), so a large build holds no more
# than a small one and the build's peak memory stays flat in corpus size.
HELD_BYTES: Final = 32 << 20


class _Held:
    """Encoded arrays held for the shard phase, by file name (thread-safe)."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.items: dict[str, tuple[Any, int]] = {}
        self.bytes = 0

    def put(self, path: Path, value: Any, nbytes: int) -> bool:
        """Hold ``value`` as the file ``path``; False (nothing held) past HELD_BYTES."""
        with self.lock:
            if self.bytes + nbytes > HELD_BYTES:
                return False
            self.items[str(path)] = (value, nbytes)
            self.bytes += nbytes
            return True

    def get(self, path: str) -> Any:
        with self.lock:
            got = self.items.get(path)
        return None if got is None else got[0]

    def release(self, stage_dir: str) -> None:
        """Drop what is held for ``stage_dir``'s encoded files."""
        prefix = os.path.join(encoded_dir(stage_dir), "")
        with self.lock:
            for name in [n for n in self.items if n.startswith(prefix)]:
                self.bytes -= self.items.pop(name)[1]


_HELD = _Held()


def release_encoded(stage_dir: str) -> None:
    """Forget the encoded output held in memory for the stage (with its files, once sharded)."""
    _HELD.release(stage_dir)


def read_encoded(path: str) -> np.ndarray:
    """The ids an encode task wrote to ``path`` (or held under that name)."""
    held = _HELD.get(path)
    return held if held is not None else read_shard(Path(path))


def read_fragment(path: str) -> pa.Table:
    """The document fragment an encode task wrote to ``path`` (or held under that name)."""
    held = _HELD.get(path)
    return held if held is not None else read_table(Path(path))


def _put_encoded(task: EncodeTask, split: str, ids: np.ndarray, fragment: pa.Table) -> None:
    """Hand a split's ids and fragment on: held in memory when the task may, else written."""
    path, frag_path = (
        encoded_path(task.stage_dir, task.number, split),
        fragment_path(task.stage_dir, task.number, split),
    )
    if not (task.hold and _HELD.put(path, ids, ids.nbytes)):
        write_shard(path, ids, durable=False)
    if not (task.hold and _HELD.put(frag_path, fragment, fragment.nbytes)):
        write_table(frag_path, fragment, durable=False)


def encode_part(task: EncodeTask) -> dict[str, dict[str, int]]:
    """Encode one part's kept documents per split, markers added. Hands on per split its
    ids and a document fragment (length, input, hash per document), see _put_encoded; returns per
    split the totals
    ``tokens``, ``content`` (tokens without the begin/end markers), ``documents``, ``unknown``,
    ``bytes`` and ``words``."""
    from seqpipe.recipe import SPLIT_NAMES
    from seqpipe.tokenizers.base import expand

    recipe = task.recipe
    enc = _encoder(recipe, task.stage_dir)
    docs, keys, codes = _read_part(task.cache_dir, task.key)
    pieces = docs.column("pieces").to_numpy()
    inputs = np.asarray(task.inputs, np.int32)[docs.column("member").to_numpy()]
    splits = assign_splits(recipe.splits, fixed16(docs, "hash"), task.keep, task.fixed)
    values, offsets = enc.piece_ids(keys)
    voc = enc.vocabulary
    begin, end = _markers(recipe, enc)
    unk = voc.unknown_id
    hashes = docs.column("hash").combine_chunks()
    # one id per piece (whole-word kinds): a table of the part's keys in the ids' stored type,
    # so each split is one gather of its codes straight into the type it is written in
    table = values.astype(task.dtype) if len(offsets) == len(values) + 1 and (np.diff(offsets) == 1).all() else None
    if table is not None and len(codes) and int(codes.max()) >= len(table):
        where = _part_dir(task.cache_dir, task.key)
        raise ShardCorruptError(
            f"{where}: a piece code has no key; remove that directory to rebuild the part", path=str(where)
        )
    whole = len(splits) > 0 and bool((splits == splits[0]).all())  # one split: no per-piece mask
    piece_split = None if whole else np.repeat(splits, pieces)  # once, not a repeat per split
    out: dict[str, dict[str, int]] = {}
    for s, split in enumerate(SPLIT_NAMES):
        dmask = splits == s
        if not dmask.any():
            continue
        split_codes = codes if piece_split is None else codes[piece_split == s]
        if table is not None:
            ids, lengths = _gathered(table, split_codes), pieces[dmask].astype(np.int64)
        else:
            ids, lengths = expand(values, offsets, split_codes, pieces[dmask])
        content = len(ids)  # the documents' own tokens, before begin/end markers
        # in the ids' stored type from here on: the marker pass moves a quarter of the bytes
        ids = _add_markers(ids.astype(task.dtype, copy=False), lengths, begin, end)
        lengths = lengths + (begin is not None) + (end is not None)
        unknown = int(np.count_nonzero(ids == unk)) if unk is not None else 0
        fragment = pa.table(
            {
                "length": pa.array(lengths, pa.int64()),
                "input": pa.array(inputs[dmask]),
                "hash": hashes.filter(pa.array(dmask)),
            }
        )
        _put_encoded(task, split, ids, fragment)
        out[split] = {
            "tokens": int(lengths.sum()),
            "content": content,
            "documents": int(dmask.sum()),
            "unknown": unknown,
            "bytes": int(docs.column("bytes").to_numpy()[dmask].sum()),
            "characters": int(docs.column("characters").to_numpy()[dmask].sum()),
            "words": int(docs.column("words").to_numpy()[dmask].sum()),
        }
    return out


def _gathered(table: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """``table[codes]`` for codes already checked to be below ``len(table)``: Arrow's take reads
    the small unsigned codes as they are, where numpy would first copy them to 8-byte indices."""
    ids: np.ndarray = pc.take(pa.array(table), pa.array(codes), boundscheck=False).to_numpy(zero_copy_only=False)
    return ids


def _add_markers(ids: np.ndarray, lengths: np.ndarray, begin: int | None, end: int | None) -> np.ndarray:
    """Insert begin/end ids around each document (vectorized)."""
    extra = (begin is not None) + (end is not None)
    if not extra:
        return ids
    new_len = lengths + extra
    out = np.empty(int(new_len.sum()), dtype=ids.dtype)
    starts = np.cumsum(new_len) - new_len
    body = np.ones(len(out), dtype=bool)
    if begin is not None:
        out[starts] = begin
        body[starts] = False
    if end is not None:
        out[starts + new_len - 1] = end
        body[starts + new_len - 1] = False
    out[body] = ids
    return out


# -- shards ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ShardTask:
    path: str
    pieces: tuple[tuple[str, int, int], ...]  # (encoded file, start, end) in stream order
    compression: str | None
    dtype: str
    # train shards: the vocabulary size, and the task also returns how often each id occurs
    # (``id_counts``), counted here while the ids are in memory rather than read back by the driver
    count_ids: int | None = None


def write_shard_task(task: ShardTask) -> dict[str, Any]:
    """Concatenate slices of encoded files into one shard; return its size and hashes (and,
    with ``count_ids``, each id's occurrences in it). The file is fsynced here, its
    directory when the build syncs its whole stage before publishing it (shards.sync_tree)."""
    from seqpipe._hashing import hash_file

    chunks = [read_encoded(p)[a:b] for p, a, b in task.pieces]
    ids = np.concatenate(chunks).astype(task.dtype, copy=False) if chunks else np.zeros(0, task.dtype)
    target = Path(task.path)
    if target.exists():  # left by an interrupted run of the same build: keep it if it checks out
        want = hash_array(ids)
        try:
            old = read_shard(target, dtype=np.dtype(task.dtype), expected_tokens=len(ids))
            compressed = _is_compressed(target)
            if hash_array(old) == want and compressed == (task.compression is not None):
                return {
                    "bytes": target.stat().st_size,
                    "token_hash": want,
                    "file_hash": hash_file(target),
                    "tokens": len(ids),
                    "reused": True,
                    **_id_counts(ids, task.count_ids),
                }
        except SeqpipeError:
            pass
    size, token_hash = write_shard(target, ids, compression=task.compression, durable=False)
    # its data now, while other tasks still compute (their directory is synced once, at publish)
    fsync_file(target)
    return {
        "bytes": size,
        "token_hash": token_hash,
        "file_hash": hash_file(target),
        "tokens": len(ids),
        "reused": False,
        **_id_counts(ids, task.count_ids),
    }


def _id_counts(ids: np.ndarray, vocab_size: int | None) -> dict[str, np.ndarray]:
    """How often each id below ``vocab_size`` occurs, as ``{"id_counts": ...}``; nothing without one."""
    if vocab_size is None:
        return {}
    counts = np.zeros(vocab_size, np.int64)
    # in slices: bincount copies its input to intp first, and a whole shard's copy (8 bytes per
    # id) would be fresh memory to fault in (DEVELOPERS.md, "Where the time goes")
    for at in range(0, len(ids), COUNT_SLICE):
        counts += np.bincount(ids[at : at + COUNT_SLICE], minlength=vocab_size)
    return {"id_counts": counts}


def _is_compressed(path: Path) -> bool:
    meta = read_table(path).schema.metadata or {}
    return bool(meta.get(b"seqpipe.compression", b"none") != b"none")
