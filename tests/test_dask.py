"""Builds on a local Dask cluster: same bytes as one in-process worker, parts sent in batches,
also when a worker process dies in the middle of an ingest task and Dask runs its batch again
elsewhere."""

from __future__ import annotations

import functools
import os
from collections.abc import Callable, Iterator
from concurrent.futures import Executor, Future
from pathlib import Path
from typing import Any

import pytest

distributed = pytest.importorskip("distributed")

from test_scale import SMALL_PARTS, dataset_files, make_recipe, write_corpus  # noqa: E402

from seqpipe import build  # noqa: E402
from seqpipe._runner import Batch  # noqa: E402
from seqpipe.dask_support import cluster_slots, executor_for_client  # noqa: E402
from seqpipe.ingest import ingest_part, ingest_threads  # noqa: E402
from seqpipe.manifest import MANIFEST_NAME  # noqa: E402

TINY_PARTS = SMALL_PARTS // 8


@pytest.fixture(scope="module")
def client() -> Iterator[Any]:
    """One two-process local cluster for the whole module (start-up is the slow part)."""
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
    with cluster, distributed.Client(cluster) as c:
        yield c


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """The corpus root and a reference dataset built with workers=1."""
    base = tmp_path_factory.mktemp("dask")
    root = base / "src"
    write_corpus(root)
    build(make_recipe(root), base / "reference", workers=1, progress=False, part_bytes=SMALL_PARTS)
    build(make_recipe(root), base / "tiny-reference", workers=1, progress=False, part_bytes=TINY_PARTS)
    return root, base / "reference"


def test_cluster_build_equals_one_worker(client: Any, corpus: tuple[Path, Path], tmp_path: Path) -> None:
    """A build through client.get_executor(pure=False) writes the workers=1 bytes."""
    root, reference = corpus
    got = build(
        make_recipe(root),
        tmp_path / "out",
        executor=executor_for_client(client),
        progress=False,
        part_bytes=SMALL_PARTS,
    )
    assert got.parts_total > 3
    files = dataset_files(got.directory)
    assert files[MANIFEST_NAME] == dataset_files(reference)[MANIFEST_NAME]
    assert files == dataset_files(reference)


def test_many_parts_go_in_few_batches_and_workers_take_one_ingest_thread(
    client: Any, corpus: tuple[Path, Path], tmp_path: Path
) -> None:
    """With more parts than 8 per worker thread, tasks are sent as batches (fewer submissions than
    parts), the bytes are unchanged, and each worker that ran one uses one ingest thread per task."""
    root, reference = corpus
    counting = CountingExecutor(executor_for_client(client))
    got = build(make_recipe(root), tmp_path / "out", executor=counting, progress=False, part_bytes=TINY_PARTS)
    assert got.parts_total > 2 * 8  # more than BATCHES_PER_SLOT per slot: batched
    ingest_sends = [args for fn, args in counting.sent if isinstance(fn, Batch) and fn.fn is ingest_part]
    assert sum(len(a) for a in ingest_sends) == got.parts_total
    assert len(ingest_sends) < got.parts_total
    assert dataset_files(got.directory) == dataset_files(reference.parent / "tiny-reference")
    assert set(client.run(ingest_threads).values()) == {1}


def test_cluster_slots_are_the_workers_threads(client: Any) -> None:
    """The executor over a two-worker, one-thread-each cluster runs two tasks at once."""
    assert cluster_slots(executor_for_client(client)) == 2


def _crash_once(marker: str, fn: Callable[[Any], Any], task: Any) -> Any:
    """Run ``fn(task)``; on the first ingest batch ever (no marker file yet), let the worker
    process die right after its first task wrote its first cache file, leaving a torn temporary part."""
    if isinstance(fn, Batch) and fn.fn is ingest_part:
        try:
            fd = os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        except FileExistsError:
            pass
        else:
            os.close(fd)
            import seqpipe.ingest

            real = seqpipe.ingest.write_table

            def write_then_die(*args: Any, **kwargs: Any) -> int:
                real(*args, **kwargs)
                os._exit(1)  # the worker process is gone, mid-task

            seqpipe.ingest.write_table = write_then_die  # type: ignore[assignment]
    return fn(task)


class CountingExecutor(Executor):
    """Passes calls on to ``inner`` (with its task slots) and records each (fn, argument)."""

    def __init__(self, inner: Executor) -> None:
        self.inner = inner
        self.task_slots = cluster_slots(inner)
        self.sent: list[tuple[Any, Any]] = []

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        self.sent.append((fn, args[0]))
        return self.inner.submit(fn, *args, **kwargs)


class CrashOnceExecutor(Executor):
    """Submits every call through ``_crash_once`` (a top-level function + partial: picklable)."""

    def __init__(self, inner: Executor, marker: Path) -> None:
        self.inner = inner
        self.marker = str(marker)
        self.task_slots = cluster_slots(inner)

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        return self.inner.submit(functools.partial(_crash_once, self.marker, fn), *args, **kwargs)


def test_build_survives_a_killed_worker(client: Any, corpus: tuple[Path, Path], tmp_path: Path) -> None:
    """A worker dying inside an ingest task is retried by Dask and the dataset is unchanged."""
    root, reference = corpus
    marker = tmp_path / "crashed"
    ex = CrashOnceExecutor(executor_for_client(client), marker)
    got = build(
        make_recipe(root),
        tmp_path / "out",
        executor=ex,
        progress=False,
        part_bytes=SMALL_PARTS,
        cache_dir=tmp_path / "cache",
    )
    assert marker.exists()  # the crash did happen
    assert dataset_files(got.directory) == dataset_files(reference)
    # both workers are back (the nanny restarted the dead one) for any later test
    client.wait_for_workers(2, timeout=30)
