"""Executors for the build: inline (one process), a local spawn pool, or any given one.

The build uses only ``submit`` and ``Future.result`` / ``as_completed``, which every
``concurrent.futures``-style engine supports (a Dask ``client.get_executor(pure=False)`` too).
"""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable, Iterator
from concurrent.futures import Executor, Future, ProcessPoolExecutor, ThreadPoolExecutor
from contextlib import contextmanager
from typing import Any, TypeVar

T = TypeVar("T")


class InlineExecutor(Executor):
    """Runs each task at submit time in this process (workers=1: no pickling, no start-up)."""

    def submit(self, fn: Callable[..., T], /, *args: Any, **kwargs: Any) -> Future[T]:
        fut: Future[T] = Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as exc:  # handed to the caller through result(), like any executor
            fut.set_exception(exc)
        return fut


def default_workers() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


@contextmanager
def executor_for(executor: Executor | None, workers: int | None) -> Iterator[Executor]:
    """The given executor (left open), or one we make and shut down."""
    if executor is not None:
        yield executor
        return
    n = workers or 1
    if n == 1:
        # one process: tasks run on threads (their numpy and Arrow work releases the GIL), as
        # many as there are cores; SEQPIPE_TASK_THREADS=1 runs them one by one
        threads = int(os.environ.get("SEQPIPE_TASK_THREADS", "0")) or default_workers()
        if threads == 1:
            yield InlineExecutor()
            return
        with ThreadPoolExecutor(max_workers=threads) as tpool:
            tpool.seqpipe_threads = threads  # type: ignore[attr-defined]  # read by the build
            yield tpool
        return
    from seqpipe.ingest import set_ingest_threads

    # the cores are shared out: each worker's ingest threads get cores // workers of them
    pool = ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("spawn"),
                               initializer=set_ingest_threads, initargs=(max(1, default_workers() // n),))
    try:
        yield pool
    finally:
        pool.shutdown(wait=True)
