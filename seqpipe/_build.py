"""Build a dataset from a recipe: the driver that plans tasks and assembles the result.

Phases (each a batch of executor tasks, see seqpipe/ingest.py)::

    plan     resolve globs, hash inputs (stat-cached), cut files into parts
    ingest   read + clean + segment each part            -> cached parts (reused across builds)
    assign   drop duplicates, assign splits (driver, numpy over document hashes)
    count    piece counts over train documents per part  -> Arrow tables, merged by group-by
    fit      vocabulary (+ learned merges)               -> stage/vocab.arrow, tokenizer.arrow
    encode   ids per part and split                      -> stage/encoded/*
    shard    fixed-size shards per split                 -> stage/shards/<split>/*.arrow
             and, in the driver meanwhile, docs tables   -> stage/docs/<split>.arrow
    publish  manifest, atomic rename into the output directory
    upload   only when the output is a URI: the local dataset copied up (seqpipe/remote.py)

Document order and every tie come from the inputs (recipe order, sorted paths, byte order),
never from task completion order, so 1 worker, N workers or a cluster give identical bytes.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Executor, Future
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final, TypeVar

import numpy as np
import pyarrow as pa

from seqpipe import __version__
from seqpipe._hashing import hash_file, hash_json
from seqpipe.counts import CountMerger, first_occurrence
from seqpipe.errors import EmptyCorpusError, RecipeError, SourceMissingError
from seqpipe.executors import executor_for
from seqpipe.formats import DOCS_SCHEMA, OPTIONAL_TOP
from seqpipe.ingest import (
    CountTask,
    EncodeTask,
    IngestTask,
    PartMeta,
    ShardTask,
    count_part,
    encode_part,
    encoded_path,
    fixed16,
    fragment_path,
    ingest_part,
    load_part_meta,
    part_key,
    read_part_docs,
    write_shard_task,
)
from seqpipe.manifest import FORMAT, MANIFEST_NAME, dumps, seal
from seqpipe.progress import bar, enabled
from seqpipe.recipe import SPLIT_NAMES, Recipe
from seqpipe.shards import id_dtype, read_table, write_batches
from seqpipe.staging import build_lock, private_dir, publish
from seqpipe.vocab import merge_counts

PART_BYTES: Final = 16 << 20
T = TypeVar("T")


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

    @property
    def fingerprint(self) -> str:
        return str(self.manifest["dataset_fingerprint"])

    def summary_lines(self) -> list[str]:
        """Human-readable build summary."""
        m = self.manifest
        s = m["summary"]
        mbs = self.input_bytes / 1e6 / max(self.seconds, 1e-9)
        lines = [
            f"dataset      {self.directory}",
            f"fingerprint  {m['dataset_fingerprint']}",
            f"tokenizer    {m['tokenizer']['kind']}, vocabulary {m['vocabulary']['size']} (ids as {m['dtype']})",
            f"inputs       {len(m['inputs'])} file(s), {self.input_bytes / 1e6:.2f} MB read in "
            f"{self.seconds:.2f} s ({mbs:.1f} MB/s); parts reused from cache: "
            f"{self.parts_reused}/{self.parts_total}",
        ]
        for name in SPLIT_NAMES:
            sp, st = m["splits"][name], s["splits"][name]
            lines.append(
                f"{name:<12} {sp['documents']:>9} docs {sp['tokens']:>11} tokens  "
                f"{len(sp['shards'])} shard(s)  unknown {st['unknown_rate']:.4%}  "
                f"{st['bytes_per_token']:.2f} bytes/token  {st['tokens_per_word']:.2f} tokens/word"
            )
        drops = {**s["read"], **{f"clean {k}": v for k, v in s["dropped"].items()}}
        shown = {k: v for k, v in drops.items() if v and k not in ("documents", "bytes_read")}
        if s["duplicates_dropped"]:
            shown["duplicates dropped"] = s["duplicates_dropped"]
        if shown:
            lines.append("counted      " + ", ".join(f"{k}: {v}" for k, v in sorted(shown.items())))
        if "uploaded" in self.extra:
            x = self.extra
            lines.append(
                f"published    {x['uploaded']} file(s) uploaded ({x['uploaded_bytes'] / 1e6:.2f} MB), "
                f"{x['already_there']} already there, {x['deleted']} unlisted deleted; "
                f"work directory {x['work_dir']}"
            )
        return lines


def _input_hashes(files: Sequence[Path | str], cache: Path) -> list[str]:
    """XXH3-128 of each input, reusing a stored hash while its change stamp is unchanged:
    (size, mtime, inode) for a local file, (size, mtime) for a URI; a URI whose filesystem
    reports no mtime has no stamp and is hashed on every build."""
    from seqpipe.filesystem import change_stamp

    index_path = cache / "inputs.json"
    try:
        index: dict[str, Any] = json.loads(index_path.read_text())
    except (OSError, ValueError):
        index = {}
    out = []
    changed = False
    for f in files:
        stamp = change_stamp(f)
        rec = index.get(str(f))
        if stamp is not None and rec and rec.get("stamp") == stamp:
            out.append(rec["hash"])
            continue
        h = hash_file(f)
        if stamp is not None:
            index[str(f)] = {"stamp": stamp, "hash": h}
            changed = True
        out.append(h)
    if changed:
        cache.mkdir(parents=True, exist_ok=True)
        tmp = index_path.with_suffix(".tmp")
        tmp.write_text(json.dumps(index, sort_keys=True))
        os.replace(tmp, index_path)
    return out


def _run(
    executor: Executor,
    fn: Callable[[Any], T],
    tasks: Sequence[Any],
    desc: str,
    show: bool,
    unit: str = "part",
    weights: Sequence[int] | None = None,
    postfix: Callable[[list[Any]], dict[str, Any]] | None = None,
    each: Callable[[int, T], Any] | None = None,
    meanwhile: Callable[[], None] | None = None,
) -> list[Any]:
    """Submit every task, wait for all, return results in task order (never completion order).

    ``each(i, result)`` sees every result as it arrives (in completion order) and returns what
    is kept in its place, so large parts of results need not pile up; a result that is ready at submit
    time (an inline executor) is taken at once. ``meanwhile()`` is this thread's own work, done
    after every task is submitted and before waiting for them.
    """
    from concurrent.futures import as_completed

    futures: dict[Future[T], int] = {}
    results: list[Any] = [None] * len(tasks)
    total = sum(weights) if weights is not None else len(tasks)
    with bar(total, desc, unit=unit, show=show and bool(tasks), unit_scale=weights is not None) as pbar:

        def take(fut: Future[T]) -> None:
            i = futures.pop(fut)
            value = fut.result()
            results[i] = each(i, value) if each is not None else value
            pbar.update(weights[i] if weights is not None else 1)
            if postfix is not None:
                pbar.set_postfix(postfix([r for r in results if r is not None]), refresh=False)

        for i, t in enumerate(tasks):
            fut = executor.submit(fn, t)
            futures[fut] = i
            if fut.done():
                take(fut)
        if meanwhile is not None:
            meanwhile()
        for fut in as_completed(list(futures)):
            take(fut)
    return results


def build(
    recipe: Recipe,
    out: str | Path,
    *,
    executor: Executor | None = None,
    workers: int | None = None,
    cache_dir: str | Path | None = None,
    force: bool = False,
    progress: bool | None = None,
    part_bytes: int = PART_BYTES,
    work_dir: str | Path | None = None,
) -> BuildResult:
    """Build ``recipe`` into directory ``out`` and return the result.

    ``executor``: any concurrent.futures-style executor (e.g. a Dask client's
    ``get_executor(pure=False)``); otherwise ``workers`` N > 1 processes (this one and N - 1
    spawned), or (default, or 1) this process with its tasks on one thread per core.
    ``cache_dir`` keeps ingested parts for later builds (default ``out/.seqpipe/cache``);
    ``force`` ignores it. ``part_bytes``: the size inputs are cut to, on document boundaries.

    ``out`` may be a filesystem URI (a ``str`` such as ``s3://bucket/prefix``): the build then
    runs in the local ``work_dir`` (default: see :func:`seqpipe.remote.default_work_dir`) and
    is uploaded to ``out`` at the end (see :mod:`seqpipe.remote`); ``directory`` of the result
    is the URI.
    """
    from seqpipe.filesystem import is_uri

    t0 = time.perf_counter()
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise RecipeError("workers", f"expected a positive integer, got {workers!r}")
    remote = None
    if is_uri(out):
        from seqpipe.remote import default_work_dir, open_remote

        remote = open_remote(str(out))
        local = Path(work_dir) if work_dir is not None else default_work_dir(remote, cache_dir)
    elif work_dir is not None:
        raise RecipeError(
            "work_dir",
            "only used when the output is a filesystem URI (a local output directory is its own work directory)",
        )
    else:
        local = Path(out)
    local.mkdir(parents=True, exist_ok=True)
    show = enabled(progress)
    with build_lock(local):
        cache = Path(cache_dir) if cache_dir is not None else private_dir(local) / "cache"
        if force:
            shutil.rmtree(cache / "parts", ignore_errors=True)
        (cache / "parts").mkdir(parents=True, exist_ok=True)
        for stale in (cache / "parts").glob(".*.tmp"):
            shutil.rmtree(stale, ignore_errors=True)
        with executor_for(executor, workers) as ex:
            result = _build(recipe, local, ex, cache, show, part_bytes, t0)
        if remote is None:
            return result
        from seqpipe.remote import publish_remote

        stats = publish_remote(local, remote, result.manifest, show=show)
    extra = {
        **result.extra,
        "work_dir": str(local),
        "uploaded": stats.uploaded,
        "uploaded_bytes": stats.uploaded_bytes,
        "already_there": stats.reused,
        "deleted": stats.deleted,
    }
    return dataclasses.replace(result, directory=remote.uri, seconds=time.perf_counter() - t0, extra=extra)


def _build(recipe: Recipe, out: Path, ex: Executor, cache: Path, show: bool, part_bytes: int, t0: float) -> BuildResult:
    # -- plan -----------------------------------------------------------------------------------
    from seqpipe.filesystem import file_size, identity, is_uri

    files: list[tuple[int, Path | str]] = []  # a local Path, or a filesystem URI
    seen: set[Path | str] = set()
    for si, source in enumerate(recipe.sources):
        for f in source.resolve(recipe.root):
            if identity(f) not in seen:
                seen.add(identity(f))
                files.append((si, f))
    if not files:
        raise SourceMissingError(str(recipe.root), "the recipe's sources match no file")
    hashes = _input_hashes([f for _, f in files], cache)
    sizes = [file_size(f) for _, f in files]
    # a URI input is recorded as the URI; a local one relative to the recipe's directory
    inputs = [
        {"path": str(f) if is_uri(f) else os.path.relpath(f, recipe.root).replace(os.sep, "/"), "size": sz, "hash": h}
        for (_, f), sz, h in zip(files, sizes, hashes, strict=True)
    ]
    tasks: list[IngestTask] = []
    weights: list[int] = []  # approximate bytes per part, for the progress bar
    for ii, ((si, f), h) in enumerate(zip(files, hashes, strict=True)):
        plan = recipe.sources[si].plan(f, part_bytes)
        for part in plan:
            key = part_key(recipe, si, h, part)
            tasks.append(IngestTask(recipe, si, ii, str(f), part, key, str(cache)))
            weights.append(sizes[ii] // max(len(plan), 1))
    build_key = hash_json({"format": FORMAT, "recipe": recipe.fingerprint, "inputs": hashes})
    stage = _fresh_stage(out, build_key[:16])

    # -- ingest (cached) ------------------------------------------------------------------------
    metas: list[PartMeta | None] = [load_part_meta(str(cache), t.key) for t in tasks]
    todo = [i for i, m in enumerate(metas) if m is None]
    in_process = getattr(ex, "seqpipe_threads", None)
    if in_process and todo:
        # tasks already run side by side on threads: nest threads only where tasks are fewer
        inner = max(1, in_process // min(len(todo), in_process))
        tasks = [dataclasses.replace(t, threads=inner) for t in tasks]
    per_task = getattr(ex, "seqpipe_task_threads", None)
    if per_task:  # this process runs tasks too: give its tasks the spawned workers' share
        tasks = [dataclasses.replace(t, threads=per_task) for t in tasks]
    dedupe = any(getattr(s, "is_dedupe", False) for s in recipe.clean)
    if not dedupe:
        # every document is kept, so a fresh part is counted by its ingest task, while in memory
        tasks = [dataclasses.replace(t, count_order=i) for i, t in enumerate(tasks)]
    merger = CountMerger()
    merger.expect(0 if dedupe else len(todo))
    counted = [False] * len(tasks)

    def take_counts(j: int, m: PartMeta) -> PartMeta:  # merged on arrival: the driver keeps no pile
        if m.counts is not None:
            merger.add(m.counts)
            counted[todo[j]] = True
            m.counts = None
        return m

    fresh = _run(
        ex,
        ingest_part,
        [tasks[i] for i in todo],
        "reading",
        show,
        unit="B",
        weights=[weights[i] for i in todo],
        postfix=lambda done: {"documents": sum(m.documents for m in done)},
        each=take_counts,
    )
    for i, m in zip(todo, fresh, strict=True):
        metas[i] = m
    parts: list[PartMeta] = [m for m in metas if m is not None]
    reused = len(tasks) - len(todo)
    input_bytes = sum(sizes)

    # -- assign: duplicates (splits are computed in the tasks from each document's hash) -------
    if sum(m.documents for m in parts) == 0:
        raise EmptyCorpusError(
            "no document is left after reading and cleaning: check the sources' "
            "globs and the clean steps (e.g. min_length)"
        )
    keeps: list[np.ndarray | None] = [None] * len(tasks)
    duplicates = 0
    if dedupe:
        # the one per-document array the driver holds: 16 bytes per document, only with dedupe
        keys = [fixed16(read_part_docs(str(cache), t.key), "dedupe") for t in tasks]
        keep_all = first_occurrence(np.concatenate(keys))
        duplicates = int((~keep_all).sum())
        bounds = np.cumsum([0] + [len(k) for k in keys])
        keeps = [keep_all[bounds[i] : bounds[i + 1]] for i in range(len(tasks))]
        del keys, keep_all

    # -- count + fit ----------------------------------------------------------------------------
    recount = [i for i, done in enumerate(counted) if not done]  # reused parts (or dedupe)
    count_tasks = [CountTask(str(cache), tasks[i].key, i, recipe, keeps[i]) for i in recount]
    merger.expect(len(count_tasks))
    _run(ex, count_part, count_tasks, "counting", show, each=lambda _, c: merger.add(c))
    if merger.train_documents == 0:
        raise EmptyCorpusError("the train split is empty: add documents or raise splits.train")
    merged = merger.result()
    encoder = recipe.tokenizer.fit(merged, recipe.vocab)
    vocab = encoder.vocabulary
    dtype = id_dtype(len(vocab))
    for stale in ("vocab.arrow", "tokenizer.arrow"):
        (stage / stale).unlink(missing_ok=True)
    vocab.save(stage / "vocab.arrow")
    tok_files = encoder.save(stage)

    # -- encode ---------------------------------------------------------------------------------
    shutil.rmtree(stage / "encoded", ignore_errors=True)
    enc_tasks = [
        EncodeTask(str(cache), t.key, str(stage), recipe, i, t.input_index, keeps[i], dtype.name)
        for i, t in enumerate(tasks)
    ]
    encoded = _run(ex, encode_part, enc_tasks, "encoding", show)

    # -- shards + docs tables -------------------------------------------------------------------
    splits_out: dict[str, Any] = {}
    summary_splits: dict[str, Any] = {}
    shard_tasks: list[ShardTask] = []
    shard_slots: list[tuple[str, int]] = []
    split_parts: dict[str, list[int]] = {}  # per split, the encoded parts that hold some of it
    per_shard = recipe.shards.tokens
    compression = None if recipe.shards.compression == "none" else recipe.shards.compression
    for split in SPLIT_NAMES:
        files_list = [(i, enc[split]["tokens"]) for i, enc in enumerate(encoded) if split in enc]
        split_parts[split] = [i for i, _ in files_list]
        totals = {
            k: sum(enc[split][k] for enc in encoded if split in enc)
            for k in ("tokens", "documents", "unknown", "bytes", "words")
        }
        n_tokens = totals["tokens"]
        file_starts = np.cumsum([0] + [n for _, n in files_list])
        shard_meta: list[dict[str, Any]] = []
        for k, first in enumerate(range(0, n_tokens, per_shard)):
            last = min(first + per_shard, n_tokens)
            pieces = []
            for (i, n), fs in zip(files_list, file_starts[:-1], strict=True):
                a, b = max(first, int(fs)), min(last, int(fs) + n)
                if a < b:
                    pieces.append((str(encoded_path(str(stage), i, split)), a - int(fs), b - int(fs)))
            rel = f"shards/{split}/{k:06d}.arrow"
            shard_tasks.append(ShardTask(str(stage / rel), tuple(pieces), compression, dtype.name))
            shard_slots.append((split, len(shard_meta)))
            shard_meta.append({"path": rel, "tokens": last - first, "documents": 0, "first": first})
        splits_out[split] = {"documents": totals["documents"], "tokens": n_tokens, "shards": shard_meta}
        summary_splits[split] = {
            "unknown": totals["unknown"],
            "unknown_rate": totals["unknown"] / n_tokens if n_tokens else 0.0,
            "bytes_per_token": totals["bytes"] / n_tokens if n_tokens else 0.0,
            "tokens_per_word": n_tokens / totals["words"] if totals["words"] else 0.0,
            "documents_assigned": totals["documents"],
        }

    def write_docs_tables() -> None:
        """The docs tables, streamed fragment by fragment (while the shard tasks run); counts
        the documents starting in each shard."""
        for split in SPLIT_NAMES:
            rel = f"docs/{split}.arrow"
            shard_meta = splits_out[split]["shards"]
            docs_in = np.zeros(len(shard_meta), np.int64)
            size = write_batches(
                stage / rel, DOCS_SCHEMA, _docs_batches(stage, split, split_parts[split], per_shard, docs_in)
            )
            for j, count in enumerate(docs_in):
                shard_meta[j]["documents"] = int(count)
            splits_out[split]["docs"] = {"path": rel, "bytes": size, "hash": hash_file(stage / rel)}

    results = _run(ex, write_shard_task, shard_tasks, "writing shards", show, unit="shard", meanwhile=write_docs_tables)
    for (split, j), res in zip(shard_slots, results, strict=True):
        splits_out[split]["shards"][j].update(
            bytes=res["bytes"], file_hash=res["file_hash"], token_hash=res["token_hash"]
        )
    shutil.rmtree(stage / "encoded", ignore_errors=True)

    # -- manifest + publish ---------------------------------------------------------------------
    read_tot: dict[str, int] = {}
    dropped_tot: dict[str, int] = {}
    for m in parts:
        for name, v in m.read.items():
            read_tot[name] = read_tot.get(name, 0) + v
        for name, v in m.dropped.items():
            dropped_tot[name] = dropped_tot.get(name, 0) + v
    body = {
        "format": FORMAT,
        "seqpipe_version": __version__,
        "recipe": recipe.to_dict(),
        "recipe_fingerprint": recipe.fingerprint,
        "inputs": inputs,
        "tokenizer": {
            "kind": recipe.tokenizer.kind,
            "vocab_size": len(vocab),
            "files": [
                {"path": f, "bytes": (stage / f).stat().st_size, "hash": hash_file(stage / f)} for f in tok_files
            ],
        },
        "vocabulary": {
            "path": "vocab.arrow",
            "bytes": (stage / "vocab.arrow").stat().st_size,
            "hash": hash_file(stage / "vocab.arrow"),
            "size": len(vocab),
        },
        "dtype": dtype.name,
        "splits": splits_out,
        "summary": {
            "read": read_tot,
            "dropped": dropped_tot,
            "duplicates_dropped": duplicates,
            "splits": summary_splits,
        },
    }
    manifest = seal(body)
    (stage / MANIFEST_NAME).write_text(dumps(manifest))
    entries = ["vocab.arrow", *tok_files, "docs", "shards"]
    for gone in OPTIONAL_TOP:
        if gone not in entries and (out / gone).exists():
            (out / gone).unlink()
    publish(out, stage, entries, MANIFEST_NAME)
    shutil.rmtree(stage, ignore_errors=True)
    return BuildResult(out, manifest, time.perf_counter() - t0, input_bytes, len(tasks), reused)


DOCS_BATCH_ROWS: Final = 1 << 16


def _docs_batches(
    stage: Path, split: str, numbers: Sequence[int], per_shard: int, docs_in: np.ndarray
) -> Iterator[pa.RecordBatch]:
    """The split's documents with stream start offsets, re-cut into batches of DOCS_BATCH_ROWS
    rows so the file's layout depends on its content only (not on how inputs were split into
    parts); adds to ``docs_in`` the number of documents starting in each shard."""
    start = 0
    pending: list[pa.Table] = []
    rows = 0
    for i in numbers:
        frag = read_table(fragment_path(str(stage), i, split))
        lengths = frag.column("length").to_numpy()
        starts = start + np.cumsum(lengths) - lengths
        start += int(lengths.sum())
        if len(starts):
            np.add.at(docs_in, starts // per_shard, 1)
        pending.append(
            pa.table(
                {
                    "start": pa.array(starts, pa.int64()),
                    "length": frag.column("length"),
                    "source": frag.column("source"),
                    "hash": frag.column("hash"),
                },
                schema=DOCS_SCHEMA,
            )
        )
        rows += len(lengths)
        while rows >= DOCS_BATCH_ROWS:
            table = pa.concat_tables(pending).combine_chunks()
            yield table.slice(0, DOCS_BATCH_ROWS).to_batches()[0]
            pending, rows = [table.slice(DOCS_BATCH_ROWS)], rows - DOCS_BATCH_ROWS
    if rows:
        yield pa.concat_tables(pending).combine_chunks().to_batches()[0]


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


__all__ = ["BuildResult", "build", "merge_counts"]
