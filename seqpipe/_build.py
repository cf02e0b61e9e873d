"""Build a dataset from a recipe: the driver, a short chain of phases over explicit values.

Each phase is a function below that takes and returns small frozen values. The executor tasks
the phases run are in seqpipe/ingest.py, how they run (order, progress) in seqpipe/_runner.py,
and the shard phase's arithmetic (shard cuts, documents tables) in seqpipe/_layout.py::

    plan     resolve globs, hash inputs (stat-cached), cut files into parts      -> Plan
    ingest   read + clean + segment each part, task per part, cached parts reused -> Ingested
    assign   which documents are kept: duplicates, near-copies and held-out overlap found by
             hash-partitioned tasks (seqpipe/_dedupe.py); a drop list per part -> Kept
             (splits are not assigned here: each task computes its documents' splits from
             their content hashes, seqpipe/splits.py)
    count    piece counts over train documents, task per part, merged by group-by -> count table
    fit      vocabulary (+ learned merges)     -> stage/vocab.arrow, tokenizer.arrow -> Fitted
    encode   ids per part and split, task per part -> held in memory for the shard tasks when
             they run in this process (up to a bound), else stage/encoded/* -> per-part totals
    shard    fixed-size shards per split, task per shard -> stage/shards/<split>/*.arrow
             and, in the driver meanwhile, documents tables -> stage/documents/<split>.arrow -> Sharded
    publish  manifest, the stage fsynced at once, atomic rename into the output directory -> manifest
    upload   only when the output is a URI: the local dataset copied up (seqpipe/transfer.py)

Document order and every tie come from the inputs (recipe order, sorted paths, byte order),
never from task completion order, so 1 worker, N workers or a cluster give identical bytes.
"""

from __future__ import annotations

import dataclasses
import json
import operator
import os
import shutil
import stat
import time
from collections.abc import Callable, Container, Iterator, Sequence
from concurrent.futures import Executor, Future, ThreadPoolExecutor, wait
from contextlib import AbstractContextManager, nullcontext, suppress
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import pyarrow as pa
import xxhash

from seqpipe import __version__
from seqpipe._dedupe import (
    Finished,
    Masked,
    PartitionTask,
    PartTask,
    Scheme,
    drop_list,
    finish_part,
    group_partition,
    masked_count,
    masked_encode,
    overlap_lists,
    overlap_partition,
    partitions_for,
    reset,
    resolve_pairs,
    write_keys,
)
from seqpipe._environment import environment, part_environment
from seqpipe._hashing import hash_bytes, hash_chunks, hash_file, hash_json
from seqpipe._layout import SplitLayout, lay_out, split_entry, split_summary, write_docs_tables
from seqpipe._parse import to_plain
from seqpipe._reuse import VocabSource, adopt_vocabulary, open_vocab_source, reused_entry, vocabulary_fingerprint
from seqpipe._runner import View, run, run_beside
from seqpipe.counts import CountMerger
from seqpipe.errors import (
    EmptyCorpusError,
    OutputWriteError,
    RecipeError,
    SeqpipeError,
    SourceError,
    SourceMissingError,
)
from seqpipe.executors import InlineExecutor, TaskPool, task_pool
from seqpipe.filesystem import FILE_GONE, change_stamp, file_size, identity, is_uri
from seqpipe.formats import DOCS_DIR, OPTIONAL_TOP, SHARDS_DIR, VOCAB_FILE
from seqpipe.ingest import (
    PART_FORMAT,
    CountTask,
    EncodeTask,
    IngestTask,
    Member,
    PartMeta,
    count_part,
    counts_file,
    encode_part,
    encoded_dir,
    ingest_part,
    load_part_meta,
    part_intact,
    part_key,
    release_encoded,
    train_id_counts,
    write_shard_task,
)
from seqpipe.manifest import FORMAT, MANIFEST_NAME, MAX_MANIFEST_BYTES, dumps, flat_texts, seal_and_dump
from seqpipe.progress import enabled
from seqpipe.recipe import SPLIT_NAMES, Recipe
from seqpipe.shards import id_dtype, read_table, sync_tree, write_table
from seqpipe.sources._stream import hold_input, release_inputs
from seqpipe.sources.base import Part
from seqpipe.splits import fixed_split_of
from seqpipe.staging import build_lock, check_output, private_dir, publish, remember_published

if TYPE_CHECKING:
    from seqpipe.storage import UriStore
    from seqpipe.transfer import PublishStats

PART_BYTES: Final = 16 << 20
# Small inputs share parts (see plan_build); tests turn this off to check that the dataset's
# bytes do not depend on how inputs are grouped.
GROUP_INPUTS = True
DEDUPE_DIR: Final = "dedupe"  # in the stage: the drop phases' work files, removed after encoding
# For the shard-count check before a build starts: no tokenizer gives fewer tokens per input
# byte than one per this many bytes on text (words average under 8 bytes with their space),
# and one shard's manifest entry takes about this many bytes (path, counts, two hashes).
BYTES_PER_TOKEN_AT_MOST: Final = 8
SHARD_ENTRY_BYTES: Final = 250


@dataclass
class BuildResult:
    """What a build produced: where (a local directory, or the URI it was published to), its
    manifest, and figures for the summary."""

    directory: Path | str
    manifest: dict[str, Any]
    seconds: float
    input_bytes: int
    parts_total: int
    parts_reused: int
    extra: dict[str, Any] = field(default_factory=dict)
    bytes_read: int | None = None  # input bytes this build read (parts taken from the cache are not); None: all

    @property
    def fingerprint(self) -> str:
        return str(self.manifest["fingerprint"])

    def _read_figures(self) -> str:
        """What this build read and how fast: only bytes it read count, so a build served from
        the cache says it read nothing rather than showing a rate it never had."""
        read = self.input_bytes if self.bytes_read is None else self.bytes_read
        if read == 0:
            return f"nothing read (all from cache), built in {self.seconds:.2f} s"
        rate = read / 1e6 / max(self.seconds, 1e-9)
        return f"{read / 1e6:.2f} MB read, built in {self.seconds:.2f} s ({rate:.1f} MB/s)"

    def summary_lines(self) -> list[str]:
        """Human-readable build summary."""
        m = self.manifest
        s = m["summary"]
        lines = [
            f"dataset      {self.directory}",
            f"fingerprint  {m['fingerprint']}",
            f"tokenizer    {m['tokenizer']['kind']}, vocabulary {m['vocabulary']['entries']} entries "
            f"(ids as {m['dtype']})",
            f"inputs       {len(m['inputs'])} file(s), {self.input_bytes / 1e6:.2f} MB; {self._read_figures()}; "
            f"parts reused from cache: {self.parts_reused}/{self.parts_total}",
        ]
        if self.extra.get("parts_damaged"):
            lines.append(
                f"cache        {self.extra['parts_damaged']} cached part(s) did not match their hashes and were rebuilt"
            )
        for name in SPLIT_NAMES:
            sp, st = m["splits"][name], s["splits"][name]
            lines.append(
                f"{name:<12} {sp['documents']:>9} documents {sp['tokens']:>11} tokens  "
                f"{len(sp['shards'])} shard(s)  unknown {st['unknown_rate']:.4%}  "
                f"{st['bytes_per_token']:.2f} bytes/token  {st['tokens_per_word']:.2f} tokens/word"
            )
        lines.extend(_empty_split_warnings(m))
        drops = {**s["read"], **{f"clean {k}": v for k, v in s["dropped"].items()}}
        shown = {k: v for k, v in drops.items() if v and k not in ("documents", "bytes_read")}
        shown.update({f"redacted {k}": v for k, v in s.get("redacted", {}).items() if v})
        if s["duplicates_dropped"]:
            shown["duplicates dropped"] = s["duplicates_dropped"]
        if s.get("near_duplicates_dropped"):
            shown["near-duplicates dropped"] = s["near_duplicates_dropped"]
        if shown:
            lines.append("counted      " + ", ".join(f"{k}: {v}" for k, v in sorted(shown.items())))
        skipped = s.get("skipped_paths", [])
        lines.extend(f"skipped      {e['path']} ({e['what']}, not a regular file)" for e in skipped[:5])
        if len(skipped) > 5:
            lines.append(f"skipped      ... and {len(skipped) - 5} more (manifest summary.skipped_paths)")
        if "uploaded" in self.extra:
            x = self.extra
            lines.append(
                f"published    {x['uploaded']} file(s) uploaded ({x['uploaded_bytes'] / 1e6:.2f} MB), "
                f"{x['already_there']} already there, {x['deleted']} unlisted deleted; "
                f"work directory {x['work_dir']}"
            )
        return lines


def _empty_split_warnings(manifest: dict[str, Any]) -> list[str]:
    """A line per split that got no document although the recipe gives it a share (a corpus too
    small for its split fractions): its loss or perplexity could not be measured."""
    fractions = manifest["recipe"]["splits"]
    return [
        f"warning      split {name!r} is empty (share {fractions[name]:g} of too few documents); "
        "add documents or change [splits]"
        for name in SPLIT_NAMES
        if manifest["splits"][name]["documents"] == 0 and fractions.get(name, 0) > 0
    ]


def build(
    recipe: Recipe,
    out: str | Path,
    *,
    executor: Executor | TaskPool | None = None,
    workers: int | None = None,
    cache_dir: str | Path | None = None,
    force: bool = False,
    progress: bool | None = None,
    part_bytes: int = PART_BYTES,
    work_dir: str | Path | None = None,
) -> BuildResult:
    """Build ``recipe`` into directory ``out`` and return the result.

    ``executor``: any concurrent.futures-style executor (e.g. a Dask client's
    ``get_executor(pure=False)``), or a :class:`seqpipe.executors.TaskPool` from
    ``executors.task_pool``; otherwise ``workers`` N > 1 processes (this one and N - 1
    spawned), or (default, or 1) this process with its tasks on one thread per core.
    ``cache_dir`` keeps ingested parts for later builds (default ``out/.seqpipe/cache``);
    ``force`` ignores it. ``part_bytes``: the size inputs are cut to, on document boundaries.

    ``out`` may be a filesystem URI (a ``str`` such as ``s3://bucket/prefix``): the build then
    runs in the local ``work_dir`` (default: see :func:`seqpipe.transfer.default_work_dir`) and
    is uploaded to ``out`` at the end (see :mod:`seqpipe.transfer`); ``directory`` of the result
    is the URI.
    """
    t0 = time.perf_counter()
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise RecipeError("workers", f"expected a positive integer, got {workers!r}")
    local, remote = _work_directory(out, work_dir, cache_dir)
    check_output(local, _inside(cache_dir, local))
    local.mkdir(parents=True, exist_ok=True)
    show = enabled(progress)
    with build_lock(local):
        cache = _open_cache(local, cache_dir, force)
        with _task_pool(executor, workers) as pool:
            result = _build(recipe, local, pool, cache, show, part_bytes, t0)
        if remote is None:
            return result
        from seqpipe.transfer import publish_remote

        stats = publish_remote(local, remote, result.manifest, show=show)
    return _uploaded(result, remote, stats, local, t0)


def _inside(cache_dir: str | Path | None, local: Path) -> tuple[str, ...]:
    """The top-level name of ``cache_dir`` within ``local``, when it lies there."""
    if cache_dir is None:
        return ()
    try:
        rel = Path(cache_dir).resolve().relative_to(local.resolve())
    except ValueError:
        return ()
    return rel.parts[:1]


def _work_directory(
    out: str | Path, work_dir: str | Path | None, cache_dir: str | Path | None
) -> tuple[Path, UriStore | None]:
    """The local directory the build runs in, and the remote it is uploaded to (or None)."""
    if is_uri(out):
        from seqpipe.transfer import default_work_dir, open_remote

        remote = open_remote(str(out))
        return (Path(work_dir) if work_dir is not None else default_work_dir(remote, cache_dir)), remote
    if work_dir is not None:
        raise RecipeError(
            "work_dir",
            "only used when the output is a filesystem URI (a local output directory is its own work directory)",
        )
    return Path(out), None


def _open_cache(local: Path, cache_dir: str | Path | None, force: bool) -> Path:
    """The parts cache, emptied with ``force``, without torn parts of an interrupted build."""
    cache = Path(cache_dir) if cache_dir is not None else private_dir(local) / "cache"
    if force:
        shutil.rmtree(cache / "parts", ignore_errors=True)
    (cache / "parts").mkdir(parents=True, exist_ok=True)
    for stale in (cache / "parts").glob(".*.tmp"):
        shutil.rmtree(stale, ignore_errors=True)
    return cache


def _task_pool(executor: Executor | TaskPool | None, workers: int | None) -> AbstractContextManager[TaskPool]:
    """A caller's task pool as it is (its owner shuts it down), else ``task_pool``'s."""
    if isinstance(executor, TaskPool):
        return nullcontext(executor)
    return task_pool(executor, workers)


def _uploaded(result: BuildResult, remote: UriStore, stats: PublishStats, local: Path, t0: float) -> BuildResult:
    """The result of a build published to ``remote``: its URI, the upload's figures, the total time."""
    extra = {
        **result.extra,
        "work_dir": str(local),
        "uploaded": stats.uploaded,
        "uploaded_bytes": stats.uploaded_bytes,
        "already_there": stats.reused,
        "deleted": stats.deleted,
    }
    return dataclasses.replace(result, directory=remote.location, seconds=time.perf_counter() - t0, extra=extra)


class _HashIndex:
    """XXH3-128 of inputs, reusing a stored hash while its change stamp is unchanged:
    (size, mtime, inode) for a local file, (size, mtime) for a URI; a URI whose filesystem
    reports no mtime has no stamp and is hashed on every build. The stored hashes are kept in
    the cache (``inputs.json``: three parallel lists, paths, stamps and hashes, which JSON
    writes and reads in a third of the time of one object per path); ``hold``: keep the small
    inputs read to hash them for this process's ingest tasks."""

    def __init__(self, cache: Path, hold: bool) -> None:
        self.cache = cache
        self.path = cache / "inputs.json"
        self.hold = hold
        self.index: dict[str, tuple[list[int], str]] = {}
        try:
            body = json.loads(self.path.read_bytes())
            self.index = dict(zip(body["paths"], zip(body["stamps"], body["hashes"], strict=True), strict=True))
        except (OSError, ValueError, KeyError, TypeError):
            pass  # none stored, or not in this layout: hashed again
        self.changed = False

    def hash(self, f: Path | str, known: list[int] | None) -> tuple[str, tuple[int, ...] | None, bool]:
        """The input's hash, its change stamp and whether the stamp held while it was hashed.
        ``known``: the stamp its listing gave (None: ask the filesystem). A file that changed
        while hashed keeps the stamp from before, so reading it is refused."""
        stamp = known if known is not None else change_stamp(f)
        rec = self.index.get(f if isinstance(f, str) else str(f))
        if stamp is not None and rec is not None and rec[0] == stamp:
            return rec[1], tuple(stamp), True
        h, after = _hash_input(f, stamp, self.hold)
        if stamp is None:
            return h, None, True
        if after != stamp:
            return h, tuple(stamp), False
        self.index[str(f)] = (stamp, h)
        self.changed = True
        return h, tuple(stamp), True

    def save(self) -> None:
        if not self.changed:
            return
        self.cache.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_suffix(".tmp")
        values = self.index.values()
        body = {"paths": list(self.index), "stamps": [v[0] for v in values], "hashes": [v[1] for v in values]}
        tmp.write_text(json.dumps(body, separators=(",", ":")))
        os.replace(tmp, self.path)


SMALL_INPUT: Final = 1 << 20  # read whole to hash: a memory map costs more than the read
_READ_FLAGS: Final = os.O_RDONLY | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_BINARY", 0)


def _read_small(f: Path | str, size: int) -> tuple[bytes, os.stat_result]:
    """A small file's bytes and its stat taken from the open file after the read: one ``os.read``
    of the listed size and a byte more, read on to the end when the stat then disagrees with the
    bytes (a file that grew, or a short read). With many small inputs, Python's buffered file
    object costs as much as the read itself."""
    fd = os.open(f, _READ_FLAGS)
    try:
        data = os.read(fd, size + 1)
        st = os.fstat(fd)
        if len(data) != st.st_size:
            more = [data]
            while chunk := os.read(fd, 1 << 20):
                more.append(chunk)
            data = b"".join(more)
            st = os.fstat(fd)
        return data, st
    finally:
        os.close(fd)


def _hash_input(f: Path | str, stamp: list[int] | None, hold: bool = False) -> tuple[str, list[int] | None]:
    """``hash_file(f)`` and the file's change stamp after it was read (what the bytes hashed
    belong to); a small local file read in one call instead of mapped, its stamp from the open
    file, its bytes kept for this process's ingest tasks with ``hold``
    (``sources._stream.hold_input``)."""
    if stamp is not None and stamp[0] < SMALL_INPUT and not is_uri(f):
        try:
            data, st = _read_small(f, stamp[0])
        except OSError:
            pass  # hash_file raises the error the build reports
        else:
            if hold and isinstance(f, str):
                hold_input(f, data)
            return xxhash.xxh3_128_hexdigest(data), [st.st_size, st.st_mtime_ns, st.st_ino]
    try:
        digest = hash_file(f)
    except FileNotFoundError as exc:  # removed since the glob listed it
        raise SourceMissingError(str(f), FILE_GONE) from exc
    except OSError as exc:
        raise SourceError(str(f), f"cannot read it to hash it: {exc}") from exc
    return digest, (change_stamp(f) if stamp is not None else None)


# -- the values phases pass on -------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Context:
    """What every phase reads: the recipe, where tasks run, the parts cache, whether bars show."""

    recipe: Recipe
    pool: TaskPool
    cache: Path
    show: bool


@dataclass(frozen=True, slots=True)
class Plan:
    """The inputs and one ingest task per part, in corpus order."""

    inputs: tuple[dict[str, Any], ...]  # the manifest's entries: path, size, hash
    tasks: tuple[IngestTask, ...]
    weights: tuple[int, ...]  # approximate bytes per part, for the progress bar
    input_bytes: int
    build_key: str  # names this build's staging directory
    skipped: tuple[dict[str, str], ...] = ()  # glob matches that are not regular files: path, what


@dataclass(frozen=True, slots=True)
class Ingested:
    """Every part's metadata (in plan order), and which parts are still to be counted."""

    parts: tuple[PartMeta, ...]
    reused: int  # parts found in the cache
    recount: tuple[int, ...]  # parts their ingest task did not count (reused ones; all with dedupe)
    damaged: int = 0  # cached parts that failed their hash check and were ingested again
    bytes_read: int = 0  # input bytes the fresh parts' tasks read (cached parts read none)


@dataclass(frozen=True, slots=True)
class Kept:
    """Which documents stay: per part the drop-list files its tasks read, and how many were dropped."""

    files: tuple[tuple[str, ...], ...]  # per part: files listing its dropped documents (none: all kept)
    documents: tuple[int, ...]  # per part
    duplicates: int
    near_duplicates: int = 0
    overlap: int = 0  # train documents whose content a fixed validation/test source also holds
    overlap_removed: int = 0  # of those, removed from train ([splits] exclude_overlap_from_train)


@dataclass(frozen=True, slots=True)
class Fitted:
    """The vocabulary's size, the ids' dtype, and the tokenizer's files in the stage."""

    vocab_size: int
    dtype: str
    files: tuple[str, ...]  # besides vocab.arrow


@dataclass(frozen=True, slots=True)
class Sharded:
    """The manifest's ``splits`` and the summary's per-split figures."""

    splits: dict[str, Any]
    summary: dict[str, Any]
    train_id_counts: np.ndarray  # occurrences of each id in the train shards, summed from their tasks


# -- the phases ------------------------------------------------------------------------------------


def _build(
    recipe: Recipe, out: Path, pool: TaskPool, cache: Path, show: bool, part_bytes: int, t0: float
) -> BuildResult:
    """The phases in order, each handing the next what it needs."""
    ctx = Context(recipe, pool, cache, show)
    source = open_vocab_source(recipe)
    early = _EarlyIngest(ctx, counting=source is None) if isinstance(pool.executor, ThreadPoolExecutor) else None
    try:  # inputs read to hash them are kept for this process's ingest tasks, then forgotten
        plan = plan_build(recipe, cache, part_bytes, source, hold=_local(pool), ready=early)
        check_shard_count(recipe, plan.input_bytes)
        stage = _fresh_stage(out, plan.build_key[:16])
    except BaseException:
        if early is not None:
            early.abandon()
        release_inputs()
        raise
    try:
        merger = CountMerger()  # parts counted by their ingest task arrive first, the others in count
        try:
            ingested = ingest(ctx, plan, merger, counting=source is None, started=early.started if early else None)
        finally:
            release_inputs()
        kept = assign(ctx, plan, ingested, stage)
        train_ids = None  # the train shards' id counts, when the corpus counts give them
        if source is None:
            counts, train_documents = count(ctx, plan, ingested, kept, merger)
            fitted = fit(recipe, counts, stage, show=ctx.show)
            train_ids = train_id_counts(recipe, str(stage), counts, train_documents, fitted.vocab_size)
        else:  # the ids of another dataset: nothing to count or fit; the shard tasks count the ids
            fitted = reuse(recipe, source, stage)
        encoded = encode(ctx, plan, kept, fitted, stage)
        layouts = lay_out(recipe, encoded, fitted.dtype, stage, fitted.vocab_size if train_ids is None else None)
        sharded = shard(ctx, layouts, stage, fitted, train_ids)
        count_train_ids(stage, sharded)
        body = _manifest_body(recipe, plan, ingested, kept, fitted, sharded, stage, source)
        texts = _inputs_texts(cache, plan.inputs)
        manifest, text = seal_and_dump(body, {"inputs": texts} if texts is not None else None)
        publish_dataset(out, stage, manifest, fitted, text)
    except OutputWriteError:
        shutil.rmtree(stage, ignore_errors=True)  # frees the space; the cache keeps what is whole
        raise
    extra = {"parts_damaged": ingested.damaged} if ingested.damaged else {}
    return BuildResult(
        out,
        manifest,
        time.perf_counter() - t0,
        plan.input_bytes,
        len(plan.tasks),
        ingested.reused,
        extra,
        bytes_read=ingested.bytes_read,
    )


def check_shard_count(recipe: Recipe, input_bytes: int) -> None:
    """Refuse, before any work, a build whose shard entries alone would make a manifest larger
    than readers accept, estimating its tokens low (so only a hopeless build is refused)."""
    tokens = input_bytes // BYTES_PER_TOKEN_AT_MOST
    shards = -(-tokens // recipe.shards.tokens)
    if shards * SHARD_ENTRY_BYTES > MAX_MANIFEST_BYTES:
        least = -(-tokens * SHARD_ENTRY_BYTES // MAX_MANIFEST_BYTES)
        raise RecipeError(
            "shards.tokens",
            f"{recipe.shards.tokens} tokens per shard gives at least {shards} shards for these "
            f"{input_bytes} input bytes, more than a manifest readers accept "
            f"({MAX_MANIFEST_BYTES} bytes) can list; raise shards.tokens (to {least} or more)",
        )


def _input_files(
    recipe: Recipe,
) -> tuple[list[tuple[int, Path | str, str]], tuple[dict[str, str], ...], list[list[int] | None]]:
    """(source index, file, recorded name) for each input, in recipe order then each source's
    sorted order (a file two sources match is read once, by the first); the matches skipped
    as not files; and per input its change stamp when listing it gave one (the walk's one
    ``lstat`` of a local file that is not a symlink is both its identity and its stamp; None:
    ask again). The name is the file's path relative to its glob's fixed directory
    (Source.resolve_named), never to the recipe."""
    files: list[tuple[int, Path | str, str]] = []  # a local path (str), or a filesystem URI
    stamps: list[list[int] | None] = []
    seen: set[Path | str] = set()
    skipped: dict[str, str] = {}
    parents: dict[str, str] = {}  # each directory resolved once, not each file's path
    for si, source in enumerate(recipe.sources):
        resolved = source.resolve_all(recipe.root, as_str=True, stamped=True)
        for rel, what in resolved.skipped:
            skipped.setdefault(rel, what)
        if len(recipe.sources) == 1 and len(source.paths) == 1 and None not in resolved.stamps:
            # one walk of plain files: it enters each real directory once, so no two of its
            # files are the same file and none needs its identity
            files.extend(zip([si] * len(resolved.files), resolved.files, resolved.names, strict=True))
            stamps.extend(resolved.stamps)
            continue
        for f, name, listed in zip(resolved.files, resolved.names, resolved.stamps, strict=True):
            same, stamp = _identity(f, listed, parents)
            if same not in seen:
                seen.add(same)
                files.append((si, f, name))
                stamps.append(stamp)
    if not files:
        raise SourceMissingError(str(recipe.root), "the recipe's sources match no file")
    return files, tuple({"path": p, "what": w} for p, w in sorted(skipped.items())), stamps


def _identity(f: Path | str, listed: list[int] | None, parents: dict[str, str]) -> tuple[Path | str, list[int] | None]:
    """``filesystem.identity(f)``, resolving each directory once: a file that is not a symlink
    is its resolved directory joined with its name. With it, the file's change stamp
    (``filesystem.change_stamp``) when one ``lstat`` gave it (a local file, not a symlink):
    ``listed``, the walk's, or else one taken here."""
    if is_uri(f):
        return identity(f), None
    if listed is None:
        try:
            st = os.lstat(f)
        except OSError:
            return identity(f), None  # the stamp asked later reports the error
        if stat.S_ISLNK(st.st_mode):  # as a str, so it equals the same file's name found directly
            return os.fspath(identity(f)), None
        listed = [st.st_size, st.st_mtime_ns, st.st_ino]
    text = os.fspath(f)
    cut = text.rfind(os.sep) + 1  # os.path.split without its calls; the head is only resolved
    head, name = text[:cut], text[cut:]
    real = parents.get(head)
    if real is None:  # with its separator, so each file's name is one concatenation
        real = parents[head] = os.path.join(os.path.realpath(head or "."), "")
    # a str never equal to a URI (those start with a scheme)
    return real + name, listed


def plan_build(
    recipe: Recipe,
    cache: Path,
    part_bytes: int,
    source: VocabSource | None = None,
    *,
    hold: bool = False,
    ready: Callable[[int, IngestTask, bool], None] | None = None,
) -> Plan:
    """Resolve the inputs, hash them, cut each large one into parts of about ``part_bytes`` and
    group consecutive small ones (of one source, in corpus order) into parts of about as much.
    ``hold``: keep small inputs read to hash them for ingest tasks in this process. When the
    inputs' names and change stamps are those the last build planned, its plan is taken whole
    from the cache (``plan.json``): a rebuild then does nothing per input beyond its ``lstat``.
    ``ready(i, task, last)``: told of part ``i`` as soon as its inputs are hashed and another
    part follows it, while later inputs are still being read (so its ingest may start), and of
    the last part (``last`` True) once every input is hashed."""
    files, skipped, stamps = _input_files(recipe)
    listing = _listing_key(recipe, part_bytes, files, stamps)
    grouped = _stored_plan(cache, listing, files, stamps)
    if grouped is None:
        announce = None if ready is None else partial(_announce, ready, recipe, str(cache))
        grouped, settled = _group_inputs(recipe, cache, part_bytes, files, stamps, hold, announce)
        if settled and listing is not None:
            _store_plan(cache, listing, grouped)
    hashes = grouped.hashes
    sizes = grouped.sizes
    inputs = tuple(
        [{"path": name, "bytes": sz, "hash": h} for (_, _, name), sz, h in zip(files, sizes, hashes, strict=True)]
    )
    tasks = tuple(IngestTask(recipe, si, members, key, str(cache)) for si, members, key, _ in grouped.parts)
    weights = tuple(weight for _, _, _, weight in grouped.parts)
    reused = source.manifest["fingerprint"] if source is not None else None
    build_key = hash_json({"format": FORMAT, "recipe": recipe.fingerprint, "inputs": hashes, "reused": reused})
    return Plan(inputs, tasks, weights, sum(sizes), build_key, skipped)


_Planned = tuple[int, tuple[Member, ...], str, int]  # source index, members, cache key, weight


def _announce(
    ready: Callable[[int, IngestTask, bool], None], recipe: Recipe, cache: str, i: int, part: _Planned, last: bool
) -> None:
    """``ready`` told of part ``i`` as its ingest task."""
    si, members, key, _ = part
    ready(i, IngestTask(recipe, si, members, key, cache), last)


@dataclass(frozen=True, slots=True)
class _Grouped:
    """What planning found: each input's hash and size, and per part its source index, members
    (in reading order), cache key and weight (its approximate bytes, for the progress bar)."""

    hashes: list[str]
    sizes: list[int]
    parts: list[_Planned]


class _Groups:
    """Parts in corpus order, made as the inputs arrive: a large input's cuts are parts of their
    own, consecutive small inputs of one source share a part up to ``part_bytes``. A part of
    small inputs that another part follows is handed to ``ready`` as soon as that is known, the
    last one by ``finish``. The cuts of large inputs are not: hashing those takes little of a
    build, and ingesting them beside it raised the peak memory of a 1 GB build of 25 MB files
    by 40-80 MiB (439-478 against 395-400 MiB)."""

    def __init__(self, recipe: Recipe, part_bytes: int, ready: Callable[[int, _Planned, bool], None] | None) -> None:
        self.recipe = recipe
        self.part_bytes = part_bytes
        self.ready = ready
        self.parts: list[_Planned] = []
        self.open: list[tuple[Member, str, int]] = []  # the group small inputs are joining
        self.source = -1
        self.held = 0
        self.waiting: int | None = None  # the part just made, until it is known what follows it

    def add(self, si: int, members: list[tuple[Member, str, int]], size: int, small: bool) -> None:
        """One input's members (member, its input's hash, weight). No part waits between calls:
        each part made here is handed on before this returns."""
        if not small:
            self.close()
            for m in members:
                self._make(si, [m], announce=False)
            return
        if self.open and (self.source != si or self.held + size > self.part_bytes):
            self.close()
            self._follows()  # by this input
        if not self.open:
            self.source, self.held = si, 0
        self.open.extend(members)
        self.held += size

    def close(self) -> None:
        """Make the open group a part."""
        if self.open:
            self._make(self.source, self.open)
            self.open = []

    def _make(self, si: int, group: list[tuple[Member, str, int]], *, announce: bool = True) -> None:
        key = part_key(self.recipe, si, [(h, m.part) for m, h, _ in group])
        self.parts.append((si, tuple(m for m, _, _ in group), key, sum(w for *_, w in group)))
        self._follows()
        self.waiting = len(self.parts) - 1 if announce else None

    def finish(self) -> None:
        """No input follows: make the open group a part, and hand on the last part as such."""
        self.close()
        self._follows(last=True)

    def _follows(self, *, last: bool = False) -> None:
        """Something follows the waiting part (or nothing will): hand it on."""
        if self.waiting is not None and self.ready is not None:
            self.ready(self.waiting, self.parts[self.waiting], last)
        self.waiting = None


def _group_inputs(
    recipe: Recipe,
    cache: Path,
    part_bytes: int,
    files: list[tuple[int, Path | str, str]],
    stamps: list[list[int] | None],
    hold: bool,
    ready: Callable[[int, _Planned, bool], None] | None = None,
) -> tuple[_Grouped, bool]:
    """Hash the inputs (stat-cached), cut them and group the small ones, one input after the
    other (see ``_Groups``); and whether every input kept its stamp while it was hashed (only
    then may the plan be stored)."""
    index = _HashIndex(cache, hold)
    cuts = _PlanCache(cache, recipe, part_bytes)
    groups = _Groups(recipe, part_bytes, ready)
    hashes: list[str] = []
    sizes: list[int] = []
    settled = True
    for ii, (si, f, _) in enumerate(files):
        h, stamp, held = index.hash(f, stamps[ii])
        settled = settled and held
        size = _size(f, stamp)
        hashes.append(h)
        sizes.append(size)
        parts = cuts.parts(si, f, h, size)
        members = [(Member(ii, str(f), part, stamp), h, size // len(parts)) for part in parts]
        groups.add(si, members, size, len(parts) == 1 and size < part_bytes and GROUP_INPUTS)
    groups.finish()
    index.save()
    cuts.save()
    return _Grouped(hashes, sizes, groups.parts), settled


PLAN_FILE: Final = "plan.json"


def _listing_key(
    recipe: Recipe, part_bytes: int, files: list[tuple[int, Path | str, str]], stamps: list[list[int] | None]
) -> str | None:
    """A fingerprint of what a plan follows from: every input's source, path, recorded name and
    change stamp, and everything a part key holds besides its inputs' hashes (``part_key``);
    None when an input has no stamp from its listing (a URI or a symlink: asked again)."""
    if None in stamps:
        return None
    digest = xxhash.xxh3_128()
    settings = {
        "format": PART_FORMAT,
        "sources": [to_plain(s) for s in recipe.sources],
        "clean": [to_plain(s) for s in recipe.clean],
        "tokenizer": to_plain(recipe.tokenizer),
        "environment": part_environment(),
        "part_bytes": part_bytes,
        "group": GROUP_INPUTS,
    }
    digest.update(hash_json(settings).encode())
    digest.update(np.array([si for si, _, _ in files], np.int64).tobytes())
    digest.update(np.array(stamps, np.int64).tobytes())
    digest.update("\0".join([str(f) for _, f, _ in files]).encode(errors="surrogateescape"))
    digest.update(b"\1")
    digest.update("\0".join([name for _, _, name in files]).encode(errors="surrogateescape"))
    return digest.hexdigest()


def _store_plan(cache: Path, listing: str, grouped: _Grouped) -> None:
    """Keep the plan for a rebuild of the same inputs, when every part of it is a plain byte
    range (``Part``); members as their input's index and range, stamps from the listing."""
    members = [m for _, ms, _, _ in grouped.parts for m in ms]
    if not all(type(m.part) is Part for m in members):
        return
    body = {
        "listing": listing,
        "hashes": grouped.hashes,
        "parts": [[si, key, weight, len(ms)] for si, ms, key, weight in grouped.parts],
        "inputs": [m.input_index for m in members],
        "starts": [m.part.start for m in members],
        "stops": [m.part.stop for m in members],
    }
    cache.mkdir(parents=True, exist_ok=True)
    tmp = cache / f".{PLAN_FILE}.tmp"
    tmp.write_text(json.dumps(body, separators=(",", ":")))
    os.replace(tmp, cache / PLAN_FILE)


def _stored_plan(
    cache: Path, listing: str | None, files: list[tuple[int, Path | str, str]], stamps: list[list[int] | None]
) -> _Grouped | None:
    """The stored plan when it was made from this very listing (see ``_listing_key``), else None."""
    if listing is None:
        return None
    try:
        body = json.loads((cache / PLAN_FILE).read_bytes())
        if body["listing"] != listing:
            return None
        # a listing key exists only when every input has its stamp
        sizes = list(map(_FIRST, stamps))  # type: ignore[arg-type]
        inputs = body["inputs"]
        starts, stops = body["starts"], body["stops"]
        if len(starts) != len(inputs) or len(stops) != len(inputs):
            return None
        # most inputs are read whole: one shared (immutable) part for them, not one each
        whole = WHOLE_PART
        if not any(starts) and stops.count(None) == len(stops):  # all of them: no per-member test
            cuts = [whole] * len(inputs)
        else:
            cuts = [whole if a == 0 and b is None else Part(a, b) for a, b in zip(starts, stops, strict=True)]
        if inputs == list(range(len(files))):  # one member per input, in corpus order
            paths = list(map(str, map(_SECOND, files)))
            own = list(map(tuple, stamps))  # type: ignore[arg-type]
        else:
            paths = [str(files[i][1]) for i in inputs]
            own = [tuple(stamps[i] or ()) for i in inputs]
        # Member._make without its Python call and length check: each row is a whole member
        members = list(map(partial(tuple.__new__, Member), zip(inputs, paths, cuts, own, strict=True)))
        parts = []
        at = 0
        for si, key, weight, n in body["parts"]:
            parts.append((si, tuple(members[at : at + n]), key, weight))
            at += n
        return _Grouped(body["hashes"], sizes, parts)
    except (OSError, ValueError, KeyError, TypeError, IndexError):
        return None  # no plan stored, or not one this build can read: plan again


INPUTS_TEXT: Final = "inputs.text"
# an entry whose texts fingerprint how flat_texts writes one (escapes, key order, indent)
_PROBE: Final[list[dict[str, Any]]] = [{"path": 'a\\"\u00e9', "bytes": 1, "hash": "0f"}]


def _inputs_texts(cache: Path, inputs: Sequence[dict[str, Any]]) -> tuple[bytes, str] | None:
    """The manifest texts of the inputs (``manifest.flat_texts``), kept in the cache for a rebuild
    of the same inputs (``inputs.text``: a JSON line naming what they were made from and the
    hash of the texts, then the texts). A cached rebuild of many small files then escapes and
    formats none of its inputs' entries again; a file that does not match is made anew."""
    key = _inputs_key(inputs)
    path = cache / INPUTS_TEXT
    try:
        head, _, payload = path.read_bytes().partition(b"\n")
        meta = json.loads(head)
        if meta["key"] == key and meta["hash"] == hash_bytes(payload):
            cut = int(meta["canonical"])
            return payload[:cut], payload[cut:].decode("ascii")
    except (OSError, ValueError, KeyError, TypeError):
        pass  # none kept, or not for these inputs
    texts = flat_texts(list(inputs))
    if texts is not None:
        payload = texts[0] + texts[1].encode("ascii")
        head = json.dumps({"key": key, "hash": hash_bytes(payload), "canonical": len(texts[0])}).encode()
        tmp = cache / f".{INPUTS_TEXT}.tmp"
        with suppress(OSError):  # a cache that cannot be written is only slower
            tmp.write_bytes(head + b"\n" + payload)
            os.replace(tmp, path)
    return texts


def _inputs_key(inputs: Sequence[dict[str, Any]]) -> str:
    """What the inputs' manifest texts follow from: each entry's path, bytes and hash, and how
    ``flat_texts`` writes an entry (its texts of a probe entry)."""
    canonical, indented = flat_texts(_PROBE) or (b"", "")
    chunks = [
        canonical,
        indented.encode("ascii"),
        "\0".join([e["path"] for e in inputs]).encode(errors="surrogateescape"),
        "\0".join([e["hash"] for e in inputs]).encode(errors="surrogateescape"),
        np.array([e["bytes"] for e in inputs], np.int64).tobytes(),
    ]
    return hash_chunks([*chunks, np.array([len(c) for c in chunks], np.int64).tobytes()])


def _size(f: Path | str, stamp: tuple[int, ...] | None) -> int:
    """An input's size: the first field of its change stamp, else asked of its filesystem."""
    return stamp[0] if stamp is not None else file_size(f)


_FIRST: Final = operator.itemgetter(0)
_SECOND: Final = operator.itemgetter(1)
WHOLE_FILE: Final = [[0, None]]  # the stored cuts of an input read whole
WHOLE_PART: Final = Part(0, None)


class _PlanCache:
    """Each input's parts (``Source.plan``), stored beside the input hashes by content hash and
    what the cuts depend on (the source's settings, ``part_bytes``): a rebuild then plans no
    input it has planned before (planning may open the file: columnar metadata, cut scans)."""

    def __init__(self, cache: Path, recipe: Recipe, part_bytes: int) -> None:
        self.path = cache / "plans.json"
        self.recipe = recipe
        self.part_bytes = part_bytes
        self.settings = [hash_json({"source": to_plain(s), "part_bytes": part_bytes})[:16] for s in recipe.sources]
        try:
            self.stored: dict[str, list[list[int | None]]] = json.loads(self.path.read_text())
        except (OSError, ValueError):
            self.stored = {}
        self.changed = False
        self.used: set[str] = set()

    def parts(self, source_index: int, f: Path | str, file_hash: str, size: int) -> list[Part]:
        source = self.recipe.sources[source_index]
        known = source.plan_sized(f, size, self.part_bytes)
        if known is not None:  # from the size alone: nothing to store
            return known
        name = f"{file_hash}.{self.settings[source_index]}"
        self.used.add(name)
        got = self.stored.get(name)
        if got == WHOLE_FILE:  # most small inputs: one shared part, not a new one per input
            return [WHOLE_PART]
        if isinstance(got, list) and got and all(isinstance(p, list) and len(p) == 2 for p in got):
            return [Part(int(a or 0), None if b is None else int(b)) for a, b in got]
        parts = source.plan(f, self.part_bytes)
        if parts and all(type(p) is Part for p in parts):
            self.stored[name] = [[p.start, p.stop] for p in parts]
            self.changed = True
        return parts

    def save(self) -> None:
        """Store the cuts of this build's inputs (those of inputs no longer planned are dropped,
        so the file does not grow with every edit)."""
        if not self.changed and len(self.used) == len(self.stored):
            return
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_suffix(".tmp")
        kept = {name: cuts for name, cuts in self.stored.items() if name in self.used}
        tmp.write_text(json.dumps(kept, sort_keys=True))
        os.replace(tmp, self.path)


def _has_dedupe(recipe: Recipe) -> bool:
    """Whether documents are dropped across the whole corpus (exact or near duplicates)."""
    return any(getattr(s, "is_dedupe", False) or getattr(s, "is_near_dedupe", False) for s in recipe.clean)


def _near_step(recipe: Recipe) -> Any:
    return next((s for s in recipe.clean if getattr(s, "is_near_dedupe", False)), None)


def _merge_arrived(merger: CountMerger, _: int, meta: PartMeta) -> tuple[PartMeta, bool]:
    """Merge the counts an ingest task delivered as they arrive (the driver keeps no pile of
    them); keep the part's metadata without them, and whether there were any."""
    if meta.counts is None:
        return meta, False
    merger.add(meta.counts)
    return dataclasses.replace(meta, counts=None), True


def _documents(meta: PartMeta) -> int:
    return meta.documents


def ingest(
    ctx: Context,
    plan: Plan,
    merger: CountMerger,
    *,
    counting: bool = True,
    started: dict[int, Future[PartMeta]] | None = None,
) -> Ingested:
    """Ingest every part not in the cache. Without a dedupe step every document is kept, so a
    fresh part is counted by its own ingest task while its arrays are in memory (into
    ``merger``); the rest are counted in the count phase. Nothing is counted without
    ``counting`` (a reused vocabulary). ``started``: parts whose ingest task already runs
    (``_EarlyIngest``), by part number."""
    cache = str(ctx.cache)
    started = started or {}
    metas, damaged = _cached_parts(cache, plan, started)
    todo = [i for i, m in enumerate(metas) if m is None]
    late = _counted_late(ctx.recipe, counting)
    threads = ctx.pool.threads.for_ingest(len(todo))
    tasks = [dataclasses.replace(plan.tasks[i], threads=threads, count_order=None if late else i) for i in todo]
    merger.expect(0 if late else len(todo))
    view = View("reading", unit="B", weights=[plan.weights[i] for i in todo], tally=("documents", _documents))
    running = {k: started[i] for k, i in enumerate(todo) if i in started}
    fresh = run(ctx.pool.executor, ctx.show, ingest_part, tasks, view, partial(_merge_arrived, merger), running)
    counted: set[int] = set()
    read = 0
    for i, (meta, was_counted) in zip(todo, fresh, strict=True):
        metas[i] = meta
        read += meta.read.get("bytes_read", 0)
        if was_counted:
            counted.add(i)
    parts = tuple(m for m in metas if m is not None)
    if sum(m.documents for m in parts) == 0:
        raise EmptyCorpusError(
            "no document is left after reading and cleaning: check the sources' "
            "globs and the clean steps (e.g. min_length)"
        )
    recount = tuple(i for i in range(len(plan.tasks)) if i not in counted)
    return Ingested(parts, len(plan.tasks) - len(todo), recount, damaged, read)


def _counted_late(recipe: Recipe, counting: bool) -> bool:
    """Whether parts are counted in the count phase, not by their ingest task: counting at
    ingest sees every document, so not when some are dropped later (dedupe, overlap), and
    nothing is counted without ``counting``."""
    return _has_dedupe(recipe) or recipe.splits.exclude_overlap_from_train or not counting


class _EarlyIngest:
    """Ingest tasks started while planning still reads later inputs (``plan_build``'s
    ``ready``), on a pool of this process's threads: a part not in the cache starts as soon as
    its inputs are hashed and another part follows it, so reading and cleaning it overlaps the
    hashing of the rest (a corpus of many small files spends most of its planning time there);
    the last part starts when planning ends if another part started before it. ``ingest`` takes
    their results with the other parts'. Each is the task ``ingest`` would run among two or
    more parts (the ingest threads of one of two tasks side by side: with the first given the
    pool's threads, a corpus of one large file cut in two ran 10-25% slower, three threads on
    two cores). A rebuild, where a part was found in the cache, starts nothing more early:
    ``ingest`` then gives the few changed parts the threads they can use."""

    def __init__(self, ctx: Context, counting: bool) -> None:
        self.ctx = ctx
        self.late = _counted_late(ctx.recipe, counting)
        self.started: dict[int, Future[PartMeta]] = {}
        self.rebuild = False  # a part was found in the cache

    def __call__(self, i: int, task: IngestTask, last: bool = False) -> None:
        if self.rebuild or (last and not self.started):
            return  # maybe the only part to ingest: ingest gives it the pool's threads
        if load_part_meta(str(self.ctx.cache), task.key) is not None:
            self.rebuild = True  # in the cache: ingest checks it and takes it
            return
        threads = self.ctx.pool.threads.for_ingest(2)
        task = dataclasses.replace(task, threads=threads, count_order=None if self.late else i)
        self.started[i] = self.ctx.pool.executor.submit(ingest_part, task)

    def abandon(self) -> None:
        """Planning failed: drop the tasks not yet running and wait for the others."""
        for fut in self.started.values():
            fut.cancel()
        wait(list(self.started.values()))


def _cached_parts(cache: str, plan: Plan, started: Container[int] = ()) -> tuple[list[PartMeta | None], int]:
    """The metadata of each part found whole in the cache (None for the others, and for the
    ``started`` ones, fresh whatever the cache holds by now), and how many were there but no
    longer match their hashes (removed, so they are ingested again)."""
    metas = [None if i in started else load_part_meta(cache, t.key) for i, t in enumerate(plan.tasks)]
    damaged = 0
    for i, meta in enumerate(metas):
        if meta is not None and not part_intact(cache, meta):
            shutil.rmtree(Path(cache) / "parts" / meta.key, ignore_errors=True)
            metas[i] = None
            damaged += 1
    return metas, damaged


def assign(ctx: Context, plan: Plan, ingested: Ingested, stage: Path) -> Kept:
    """Which documents stay: with a dedupe step, an exact duplicate keeps its first occurrence
    in corpus order, and with a near_dedupe step so does the first of each group of near-duplicates
    (splits are computed in the tasks, from each document's hash); then the
    train documents that a fixed validation/test source also holds are counted (and removed
    with ``exclude_overlap_from_train``). All per-document work runs in hash-partitioned tasks
    (seqpipe/_dedupe.py) that leave a drop list per part in ``stage``; the driver keeps figures
    per part."""
    recipe = ctx.recipe
    documents = tuple(m.documents for m in ingested.parts)
    exact = any(getattr(s, "is_dedupe", False) for s in recipe.clean)
    near = _near_step(recipe)
    held = any((_fixed(recipe, t) or 0) > 0 for t in plan.tasks)
    if not (exact or near is not None or held):
        return Kept(((),) * len(plan.tasks), documents, 0)
    rows = int(exact) + (int(near.bands) if near is not None else 0)
    scheme = Scheme(
        str(ctx.cache),
        str(stage / DEDUPE_DIR),
        len(plan.tasks),
        partitions_for(sum(documents), rows),
        exact,
        (int(near.bands), int(near.rows), float(near.threshold)) if near is not None else None,
        recipe.splits if held else None,
    )
    reset(scheme.work_dir, [t.key for t in plan.tasks])
    return _dropped(ctx, plan, scheme, documents)


def _dropped(ctx: Context, plan: Plan, scheme: Scheme, documents: tuple[int, ...]) -> Kept:
    """Run the drop phases (keys, group, resolve, finish, overlap); the per-part drop lists."""
    parts = [PartTask(scheme, i, t.key, documents[i], _fixed(ctx.recipe, t)) for i, t in enumerate(plan.tasks)]
    partitions = [PartitionTask(scheme, p) for p in range(scheme.partitions)]
    executor, show = ctx.pool.executor, ctx.show
    if scheme.exact or scheme.near is not None:
        run(executor, show, write_keys, parts, View("dedupe keys"))
        run(executor, show, group_partition, partitions, View("dedupe groups", unit="partition"))
    if scheme.near is not None:
        resolve_pairs(scheme)
    finished: list[Finished] = run(executor, show, finish_part, parts, View("drop lists"))
    overlap = 0
    if scheme.splits is not None:
        overlap = sum(run(executor, show, overlap_partition, partitions, View("overlap", unit="partition")))
    exclude = ctx.recipe.splits.exclude_overlap_from_train and overlap > 0
    shared = overlap_lists(scheme) if exclude else ()
    files = tuple(((drop_list(scheme, i),) if f.has_drops else ()) + shared for i, f in enumerate(finished))
    return Kept(
        files,
        documents,
        sum(f.exact for f in finished),
        sum(f.near for f in finished),
        overlap,
        overlap if ctx.recipe.splits.exclude_overlap_from_train else 0,
    )


def _fixed(recipe: Recipe, task: IngestTask) -> int | None:
    return fixed_split_of(recipe.sources[task.source_index])


def _masked(kept: Kept, tasks: Sequence[Any], count: bool) -> tuple[Any, list[Any]]:
    """The task function and tasks: plain ones when nothing is dropped, else each wrapped with
    its part's drop list (read by the task, not shipped as a mask)."""
    numbers = [t.order if count else t.number for t in tasks]
    if not any(kept.files[i] for i in numbers):
        return (count_part if count else encode_part), list(tasks)
    wrapped = [Masked(t, i, kept.documents[i], kept.files[i]) for t, i in zip(tasks, numbers, strict=True)]
    return (masked_count if count else masked_encode), wrapped


def _merge_counted(merger: CountMerger, _: int, counted: tuple[pa.Table, int]) -> None:
    merger.add(counted)


def count(ctx: Context, plan: Plan, ingested: Ingested, kept: Kept, merger: CountMerger) -> tuple[pa.Table, int]:
    """Count the parts not counted at ingest into ``merger``; the corpus-wide ``(key, count)``
    table of the train documents in first-occurrence order (taken from the cache when these very
    parts made it), and the number of train documents."""
    key = _counts_key(ctx.recipe, plan)
    stored = _stored_counts(ctx.cache, key) if key is not None else None
    if stored is not None:
        counts, train_documents = stored
    else:
        cache = str(ctx.cache)
        tasks = [
            CountTask(cache, plan.tasks[i].key, i, ctx.recipe, None, _fixed(ctx.recipe, plan.tasks[i]))
            for i in ingested.recount
        ]
        merger.expect(len(tasks))
        fn, work = _masked(kept, tasks, count=True)
        run(ctx.pool.executor, ctx.show, fn, work, View("counting"), each=partial(_merge_counted, merger))
        counts, train_documents = merger.result() if merger.train_documents else None, merger.train_documents
    if train_documents == 0 or counts is None:
        raise EmptyCorpusError("the train split is empty: add documents or raise splits.train")
    if stored is None and key is not None:
        _store_counts(ctx.cache, key, counts, train_documents)
    return counts, train_documents


MERGED_COUNTS: Final = "counts.arrow"


def _counts_key(recipe: Recipe, plan: Plan) -> str | None:
    """What the corpus counts follow from when no document is dropped after ingest: every
    part's key in corpus order (content, source, cleaning, tokenizer) and the splits settings
    (in the count files' name); None when dedupe or overlap removal drop documents."""
    if _has_dedupe(recipe) or recipe.splits.exclude_overlap_from_train:
        return None
    return hash_json({"format": PART_FORMAT, "counts": counts_file(recipe), "parts": [t.key for t in plan.tasks]})


def _stored_counts(cache: Path, key: str) -> tuple[pa.Table, int] | None:
    """The corpus counts and train documents the cache keeps (the last build's) when ``key``
    made them and they read back whole; else None (merged again)."""
    try:
        table = read_table(cache / MERGED_COUNTS, memory_map=False)
        meta = table.schema.metadata or {}
        if meta.get(b"seqpipe.parts") != key.encode() or meta.get(b"seqpipe.hash") != _counts_hash(table):
            return None
        return table.replace_schema_metadata(None), int(meta[b"seqpipe.train_documents"])
    except (OSError, SeqpipeError, pa.ArrowException, KeyError, ValueError):
        return None


def _store_counts(cache: Path, key: str, counts: pa.Table, train_documents: int) -> None:
    """Keep the corpus counts for a rebuild of the same parts (one file: a new vocabulary then
    merges no part's table). Without fsync: a torn file fails its hash and is merged again."""
    meta = {"seqpipe.parts": key, "seqpipe.hash": _counts_hash(counts), "seqpipe.train_documents": str(train_documents)}
    with suppress(OutputWriteError):  # a cache that cannot be written is only slower
        write_table(cache / MERGED_COUNTS, counts.replace_schema_metadata(meta), durable=False)


def _counts_hash(table: pa.Table) -> bytes:
    """A hash of a count table's keys and counts, whatever buffers hold them (checked when the
    stored one is read back)."""
    keys = table.column("key").combine_chunks()
    offsets = np.frombuffer(keys.buffers()[1], np.int32)[keys.offset : keys.offset + len(keys) + 1]
    digest = xxhash.xxh3_128()
    digest.update((offsets - offsets[0]).tobytes())
    data = keys.buffers()[2]
    if data is not None:
        digest.update(memoryview(data)[int(offsets[0]) : int(offsets[-1])])
    digest.update(table.column("count").to_numpy().astype(np.int64, copy=False).tobytes())
    return digest.hexdigest().encode()


def fit(recipe: Recipe, counts: pa.Table, stage: Path, *, show: bool = False) -> Fitted:
    """Fit the tokenizer's vocabulary (and learned state) on the counts; store both in the stage."""
    encoder = recipe.tokenizer.fit(counts, recipe.vocabulary, show=show)
    vocab = encoder.vocabulary
    for stale in (VOCAB_FILE, *OPTIONAL_TOP):
        (stage / stale).unlink(missing_ok=True)
    # no fsync: count_train_ids rewrites it, and publish_dataset syncs the stage before publishing
    write_table(stage / VOCAB_FILE, vocab.to_table(), durable=False)
    files = tuple(encoder.save(stage))
    return Fitted(len(vocab), id_dtype(len(vocab)).name, files)


def reuse(recipe: Recipe, source: VocabSource, stage: Path) -> Fitted:
    """Copy the reused dataset's vocabulary and tokenizer files into the stage, unchanged."""
    for stale in (VOCAB_FILE, *OPTIONAL_TOP):
        (stage / stale).unlink(missing_ok=True)
    entries, files = adopt_vocabulary(source, stage)
    return Fitted(entries, id_dtype(entries).name, files)


def encode(ctx: Context, plan: Plan, kept: Kept, fitted: Fitted, stage: Path) -> tuple[dict[str, dict[str, int]], ...]:
    """Encode every part's kept documents per split; per part, the totals per split it holds.
    Tasks that run in this process hand their output to the shard phase in memory (up to a bound)."""
    shutil.rmtree(encoded_dir(str(stage)), ignore_errors=True)
    release_encoded(str(stage))
    local = _local(ctx.pool)
    tasks = [
        EncodeTask(
            str(ctx.cache),
            t.key,
            str(stage),
            ctx.recipe,
            i,
            tuple(map(_INPUT_INDEX, t.members)),
            None,
            fitted.dtype,
            _fixed(ctx.recipe, t),
            hold=local,
        )
        for i, t in enumerate(plan.tasks)
    ]
    fn, work = _masked(kept, tasks, count=False)
    try:
        totals = tuple(run(ctx.pool.executor, ctx.show, fn, work, View("encoding")))
    except BaseException:
        release_encoded(str(stage))
        raise
    shutil.rmtree(stage / DEDUPE_DIR, ignore_errors=True)  # the drop lists are no longer read
    return totals


_INPUT_INDEX: Final = operator.attrgetter("input_index")  # a Member's, without a Python call


def _local(pool: TaskPool) -> bool:
    """Whether the pool's tasks run in this process (memory handoffs reach them)."""
    return isinstance(pool.executor, (ThreadPoolExecutor, InlineExecutor))


def shard(
    ctx: Context, layouts: Sequence[SplitLayout], stage: Path, fitted: Fitted, train_ids: np.ndarray | None = None
) -> Sharded:
    """Write every shard (tasks) and, meanwhile in this thread, the documents tables; the train
    shards' id counts are ``train_ids`` when known, else summed as their tasks finish (tasks
    laid out to count them)."""
    tasks = [task for layout in layouts for task in layout.shards]
    view = View("writing shards", unit="shard")
    id_counts = np.zeros(fitted.vocab_size, np.int64) if train_ids is None else train_ids
    try:
        results, docs = run_beside(
            ctx.pool.executor,
            ctx.show,
            write_shard_task,
            tasks,
            view,
            partial(write_docs_tables, stage, layouts),
            each=partial(_add_id_counts, id_counts),
        )
    finally:
        release_encoded(str(stage))
    shutil.rmtree(encoded_dir(str(stage)), ignore_errors=True)
    splits: dict[str, Any] = {}
    at = 0
    for layout, table in zip(layouts, docs, strict=True):
        splits[layout.name] = split_entry(layout, table, results[at : at + len(layout.shards)])
        at += len(layout.shards)
    return Sharded(splits, {layout.name: split_summary(layout.totals) for layout in layouts}, id_counts)


def _add_id_counts(total: np.ndarray, _: int, result: dict[str, Any]) -> dict[str, Any]:
    """Fold a train shard's id counts into ``total`` as it arrives; keep the rest of its result."""
    counts = result.pop("id_counts", None)
    if counts is not None:
        total += counts
    return result


def count_train_ids(stage: Path, sharded: Sharded) -> None:
    """Rewrite the vocabulary's ``count`` column as what it is documented to be: how often each
    id occurs in the train split's shards (reserved tokens and begin/end markers included). The
    fitted counts are of pieces before encoding (bpe's pre-merge symbols, 0 for reserved tokens).
    The ids' counts come from the corpus piece counts (``ingest.train_id_counts``), or, with a
    reused vocabulary (nothing counted), from the shard tasks, which counted the ids they wrote."""
    from seqpipe.vocab import Vocabulary

    vocab = Vocabulary.load(stage / VOCAB_FILE)
    table = dataclasses.replace(vocab, counts=sharded.train_id_counts).to_table()
    write_table(stage / VOCAB_FILE, table, durable=False)  # synced with the stage, at publish


def _summed(tables: Iterator[dict[str, int]]) -> dict[str, int]:
    total: dict[str, int] = {}
    for table in tables:
        for name, value in table.items():
            total[name] = total.get(name, 0) + value
    return total


def _stage_file(stage: Path, rel: str) -> dict[str, Any]:
    return {"path": rel, "bytes": (stage / rel).stat().st_size, "hash": hash_file(stage / rel)}


def _manifest_body(
    recipe: Recipe,
    plan: Plan,
    ingested: Ingested,
    kept: Kept,
    fitted: Fitted,
    sharded: Sharded,
    stage: Path,
    source: VocabSource | None = None,
) -> dict[str, Any]:
    """The manifest before sealing: what was read, fitted (or reused) and written, and the build's figures."""
    vocabulary = {
        **_stage_file(stage, VOCAB_FILE),
        "entries": fitted.vocab_size,
        "fingerprint": vocabulary_fingerprint(stage, to_plain(recipe.tokenizer), fitted.files),
    }
    if source is not None:
        vocabulary["reused_from"] = reused_entry(source)
    return {
        "format": FORMAT,
        "seqpipe_version": __version__,
        "environment": environment(),
        "recipe": recipe.to_dict(),
        "recipe_fingerprint": recipe.fingerprint,
        "inputs": list(plan.inputs),
        "tokenizer": {
            "kind": recipe.tokenizer.kind,
            "files": [_stage_file(stage, f) for f in fitted.files],
        },
        "vocabulary": vocabulary,
        "dtype": fitted.dtype,
        "splits": sharded.splits,
        "summary": {
            "read": _summed(m.read for m in ingested.parts),
            "dropped": _summed(m.dropped for m in ingested.parts),
            "duplicates_dropped": kept.duplicates,
            "train_overlap": {"documents": kept.overlap, "removed": kept.overlap_removed},
            "skipped_paths": list(plan.skipped),
            "near_duplicates_dropped": kept.near_duplicates,
            "redacted": _summed(m.redacted for m in ingested.parts),
            "splits": sharded.summary,
        },
    }


def publish_dataset(out: Path, stage: Path, manifest: dict[str, Any], fitted: Fitted, text: str | None = None) -> None:
    """Write the manifest (``text``: its ``manifest.dumps`` text, when known) into the stage and
    move everything into ``out``, the manifest last."""
    data = (dumps(manifest) if text is None else text).encode()
    if len(data) > MAX_MANIFEST_BYTES:
        raise RecipeError(
            "shards.tokens",
            f"the manifest would be {len(data)} bytes, over the {MAX_MANIFEST_BYTES} bytes "
            "readers accept; raise shards.tokens so there are fewer shards",
        )
    try:
        (stage / MANIFEST_NAME).write_bytes(data)
    except OSError as exc:
        raise OutputWriteError(f"{stage / MANIFEST_NAME}: cannot write it ({exc})", path=str(stage)) from exc
    entries = [VOCAB_FILE, *fitted.files, DOCS_DIR, SHARDS_DIR]
    # the staged files and the directories inside the entries; the stage itself needs none, since
    # publish renames every entry out of it and syncs the output directory they land in
    sync_tree(stage, [*entries, MANIFEST_NAME], root_dir=False)
    # old entries the new build lacks (tokenizer.arrow) go in publish, after the old manifest
    publish(out, stage, entries, MANIFEST_NAME)
    remember_published(out, manifest)
    shutil.rmtree(stage, ignore_errors=True)


def _fresh_stage(out: Path, name: str) -> Path:
    """This build's staging directory: other builds' stages and torn temporary files removed,
    shards of an interrupted run of the same build kept (they are checked before reuse)."""
    root = private_dir(out) / "stage"
    root.mkdir(parents=True, exist_ok=True)
    for other in root.iterdir():
        if other.name != name:
            shutil.rmtree(other, ignore_errors=True)
    stage = root / name
    stage.mkdir(exist_ok=True)
    for tmp in stage.rglob(".*.tmp"):
        tmp.unlink(missing_ok=True)
    return stage


__all__ = ["BuildResult", "build"]
