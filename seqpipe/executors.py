"""Executors for the build: inline (one process), this process plus spawned workers, or any given one.

The build uses only ``submit`` and ``Future.result`` / ``as_completed``, which every
``concurrent.futures``-style engine supports (a Dask ``client.get_executor(pure=False)`` too).
"""

from __future__ import annotations

import multiprocessing
import os
import sys
import threading
import time
from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import Executor, Future, ProcessPoolExecutor, ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Final, TypeVar

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


def task_slots(executor: Executor) -> int | None:
    """How many tasks ``executor`` runs at once when they run in other processes that each
    submitted task must reach (a Dask cluster: its workers' threads), so that sending several
    tasks as one pays off; None for an executor of this process or its spawned workers, whose
    tasks cost little to submit. An executor may say so itself with a ``task_slots`` attribute
    (a number or a method returning one)."""
    own = getattr(executor, "task_slots", None)
    if own is not None:
        slots = own() if callable(own) else own
        return int(slots) if slots else None
    if type(executor).__module__.split(".")[0] == "distributed":
        from seqpipe.dask_support import cluster_slots

        return cluster_slots(executor)
    return None


@dataclass(frozen=True, slots=True)
class Threads:
    """How tasks share the cores, which decides the ingest threads each task starts.

    ``side_by_side``: this process runs that many tasks at once on threads (one process, no
    spawned workers). ``per_task``: each task gets that many, the share of one of the processes
    that take tasks. Neither (an inline or a caller's executor): the task's own default,
    ``SEQPIPE_INGEST_THREADS`` or a spawned worker's share.
    """

    side_by_side: int | None = None
    per_task: int | None = None

    def for_ingest(self, tasks: int) -> int | None:
        """Ingest threads for each of ``tasks`` tasks about to run; None: the task's default."""
        if self.per_task:
            return self.per_task
        if self.side_by_side and tasks:
            # tasks already run side by side on threads: nest threads only where tasks are fewer
            return max(1, self.side_by_side // min(tasks, self.side_by_side))
        return None


@dataclass(frozen=True, slots=True)
class TaskPool:
    """An executor and how its tasks share the cores (what ``build`` needs to run tasks)."""

    executor: Executor
    threads: Threads = Threads()


@contextmanager
def task_pool(executor: Executor | None, workers: int | None) -> Iterator[TaskPool]:
    """The given executor (left open, default threads), or one we make and shut down.

    ``workers`` N > 1: N processes work on tasks, this one and N - 1 spawned ones
    (``SharedQueueExecutor``); each task's ingest threads get cores // N of the cores.
    """
    if executor is not None:
        yield TaskPool(executor)
        return
    n = workers or 1
    if n == 1:
        # one process: tasks run on threads (their numpy and Arrow work releases the GIL), as
        # many as there are cores; SEQPIPE_TASK_THREADS=1 runs them one by one
        threads = int(os.environ.get("SEQPIPE_TASK_THREADS", "0")) or default_workers()
        if threads == 1:
            yield TaskPool(InlineExecutor())
            return
        tpool = ThreadPoolExecutor(max_workers=threads)
        try:
            yield TaskPool(tpool, Threads(side_by_side=threads))
        finally:
            # on an interrupt or a failed task, tasks still queued are dropped, not run: only
            # the ones already running are waited for
            tpool.shutdown(wait=True, cancel_futures=True)
        return
    per_task = max(1, default_workers() // n)
    pool = process_pool(n - 1, threads=per_task)
    with worker_environment():
        for _ in range(n - 1):  # start the workers now (a pool spawns one per submit): they import
            pool.submit(int)  # numpy, pyarrow and seqpipe while this process plans the build
    shared = SharedQueueExecutor(pool, n - 1, local=1)
    try:
        yield TaskPool(shared, Threads(per_task=per_task))
    finally:
        # after a failed task the build stops: tasks still queued are dropped, not run
        shared.shutdown(wait=True, cancel_futures=True)


@contextmanager
def executor_for(executor: Executor | None, workers: int | None) -> Iterator[Executor]:
    """The executor of ``task_pool(executor, workers)`` alone."""
    with task_pool(executor, workers) as pool:
        yield pool.executor


def process_pool(workers: int, threads: int | None = None) -> ProcessPoolExecutor:
    """``workers`` spawned processes; each worker's ingest threads: ``threads``, by default
    cores // workers."""
    return ProcessPoolExecutor(
        max_workers=workers,
        mp_context=multiprocessing.get_context("spawn"),
        initializer=start_worker,
        initargs=(threads or max(1, default_workers() // workers), os.getpid()),
    )


# numpy's OpenBLAS starts a thread per core at import, and they spin for about 0.1 s of CPU
# before they sleep (measured: `import numpy` took 0.21 s of user time, 0.10 s with
# OPENBLAS_NUM_THREADS=1). In a worker spawned while the build runs, that spinning takes
# the core from a task; seqpipe never calls BLAS.
_BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "GOTO_NUM_THREADS", "OMP_NUM_THREADS")


@contextmanager
def worker_environment() -> Iterator[None]:
    """The environment processes spawned inside inherit: one BLAS thread, unless the caller's
    environment says how many; ``os.environ`` is restored afterwards."""
    if any(name in os.environ for name in _BLAS_THREAD_VARIABLES):
        yield
        return
    os.environ["OPENBLAS_NUM_THREADS"] = "1"
    try:
        yield
    finally:
        os.environ.pop("OPENBLAS_NUM_THREADS", None)


def start_worker(threads: int, parent: int = 0) -> None:
    """Set up a spawned worker process: its ingest threads, malloc that keeps freed memory, and
    (``parent``: the pid of the process that made the pool) an exit when that process is gone."""
    from seqpipe.ingest import set_ingest_threads

    set_ingest_threads(threads)
    keep_freed_memory()
    if parent:
        threading.Thread(target=_exit_with_parent, args=(parent,), daemon=True, name="seqpipe-parent-watch").start()


_PARENT_POLL_SECONDS: Final = 0.5


def _exit_with_parent(parent: int) -> None:
    """End this worker once ``parent`` is no longer its parent process.

    A parent killed with SIGKILL (or dying any way that skips the pool's shutdown) cannot tell
    its workers; they would run on as orphans, holding memory and the resource tracker open. An
    orphan is re-parented (to init or a subreaper), so a changed parent pid is the sign.
    """
    while os.getppid() == parent:
        time.sleep(_PARENT_POLL_SECONDS)
    os._exit(1)  # nobody is left to take a result; skip cleanup that could block on the dead parent


_SETTLED: list[bool] = []


def settle_remote_worker() -> None:
    """Set up, once, a process that runs tasks for a remote executor (a Dask worker): one ingest
    thread per task unless its environment sets ``SEQPIPE_INGEST_THREADS``, and malloc that keeps
    freed memory, as in spawned workers.

    The cluster already runs as many tasks at once as its workers have threads; threads nested
    in each task would only contend for those cores, and starting them costs each small part
    more than its own work.

    A Dask nanny starts its workers with ``MALLOC_TRIM_THRESHOLD_=65536``, so each part's freed
    arrays go back to the kernel and the next part's are faulted in again: measured on the
    2-core machine, one 12 MB part's ingest task took 0.54-0.83 s in such a worker, 0.23-0.40 s
    after this (``mallopt`` overrides the variable). The worker's memory then no longer shrinks
    between tasks (up to the trim threshold, see ``keep_freed_memory``).
    """
    if _SETTLED:
        return
    from seqpipe.ingest import set_ingest_threads

    if "SEQPIPE_INGEST_THREADS" not in os.environ:
        set_ingest_threads(1)
    _SETTLED.append(keep_freed_memory())


def keep_freed_memory() -> bool:
    """Ask glibc's malloc to keep freed blocks of up to 32 MiB for reuse instead of handing them
    back to the kernel; False where there is no glibc ``mallopt`` (then nothing changes).

    By default glibc unmaps a large freed array, and the next one is faulted in and zeroed page
    by page again: on the 2-core test machine that zeroing (``clear_page`` under numpy casts and
    copies) was 13% of a two-worker build's CPU time in ``perf record``, 6.6% with this set. Used in seqpipe's own
    processes (spawned workers, the command line), never on a library caller's process.
    """
    import ctypes
    import ctypes.util

    try:
        mallopt = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").mallopt
    except (OSError, AttributeError):  # not glibc (macOS, Windows)
        return False
    m_trim_threshold, m_mmap_threshold = -1, -3  # from glibc's <malloc.h>
    # 32 MiB: the largest mmap threshold glibc accepts on 64-bit (from memory of glibc's
    # malloc; mallopt returns 0 when it refuses, which is checked); the trim threshold keeps
    # up to 1 GiB of freed memory in the process (its RSS no longer shrinks between tasks)
    ok = int(mallopt(m_mmap_threshold, 32 << 20)) == 1
    ok = ok and int(mallopt(m_trim_threshold, 1 << 30)) == 1
    if ok:
        _KEEPING.append(True)
    return ok


# set once keep_freed_memory took effect in this process: its own tasks then keep their pages
# too (the command line chose speed over a driver that shrinks between tasks)
_KEEPING: list[bool] = []


_TRIM: list[Callable[[int], int] | None] = []


def return_freed_memory() -> None:
    """Hand the free pages the allocators hold back to the kernel: glibc's malloc
    (``malloc_trim(0)``, from glibc's <malloc.h>; nothing where there is no glibc) and Arrow's
    memory pool (``release_unused``; only when pyarrow is already imported). Arrow's default
    pool, mimalloc, keeps freed pages per thread and this collects the calling thread's only.
    Called in the build's own process once a phase's tasks are done, and after each task that
    process runs itself (``SharedQueueExecutor``) unless it keeps freed memory on purpose
    (``keep_freed_memory``: the command line); a spawned worker keeps its freed pages for
    its next task.

    After a task this process holds next to nothing (a few MB of live arrays, and 1-2 MB in
    Arrow's pool, by tracemalloc, ``mallinfo2`` and ``total_allocated_bytes``), yet its
    anonymous memory kept what its earlier tasks had freed, in heaps fragmented by the tasks'
    arrays, so the more tasks it ran, the higher the next one started and peaked. In the
    driver of a ``workers=2`` build of 10M short documents (scripts/benchmarks/part_scale.py),
    with a trim after each phase only, its memory after each of its 16 MiB reading tasks was
    96-137 MB where the first started from 39 MB; with this after each task, 45 MB (malloc's
    freed pages were about 60 MB of the difference, Arrow's pool 29 MB). The cost is the next
    task faulting its pages in again: 2-35 ms more CPU per task in that build's driver (see
    DEVELOPERS.md)."""
    if not _TRIM:
        import ctypes
        import ctypes.util

        try:
            _TRIM.append(ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").malloc_trim)
        except (OSError, AttributeError):  # not glibc (macOS, Windows, musl)
            _TRIM.append(None)
    trim = _TRIM[0]
    if trim is not None:
        trim(0)
    arrow = sys.modules.get("pyarrow")
    if arrow is not None:
        arrow.default_memory_pool().release_unused()


_Item = tuple[Future[Any], Callable[..., Any], tuple[Any, ...], dict[str, Any]]


class SharedQueueExecutor(Executor):
    """Tasks wait in one queue, in submission order, and go to whichever consumer is free first:
    ``local`` threads that run them in this process, or one thread per worker of ``pool`` that
    hands a task to the pool and waits for its result.

    So this process works on tasks from the first moment, while the pool's spawned workers
    are still starting (see DEVELOPERS.md, "Where the time goes"), and a slow
    worker never holds a queue of tasks another consumer could take. ``pool`` may be any
    executor with at least ``pool_workers`` workers.
    """

    def __init__(self, pool: Executor, pool_workers: int, local: int = 1) -> None:
        self._pool = pool
        self._queue: deque[_Item | None] = deque()  # None: the stop mark
        self._ready = threading.Condition()
        self._stopped = False
        self._threads = [
            threading.Thread(
                target=self._consume, args=(forward,), daemon=True, name=f"seqpipe-{'pool' if forward else 'local'}-{i}"
            )
            for forward, count in ((False, local), (True, pool_workers))
            for i in range(count)
        ]
        for t in self._threads:
            t.start()

    def submit(self, fn: Callable[..., T], /, *args: Any, **kwargs: Any) -> Future[T]:
        fut: Future[T] = Future()
        with self._ready:
            if self._stopped:
                raise RuntimeError("cannot submit to an executor that was shut down")
            self._queue.append((fut, fn, args, kwargs))
            self._ready.notify()
        return fut

    def _consume(self, forward: bool) -> None:
        while True:
            with self._ready:
                while not self._queue:
                    self._ready.wait()
                item = self._queue[0]
                if item is None:  # left in place for the other consumers
                    return
                self._queue.popleft()
            self._run(*item, forward)
            del item  # the task's arguments: this thread may wait long for the next one
            if not forward and not _KEEPING:  # what the task freed here, before this process takes the next one
                return_freed_memory()

    def _run(
        self, fut: Future[Any], fn: Callable[..., Any], args: tuple[Any, ...], kwargs: dict[str, Any], forward: bool
    ) -> None:
        if not fut.set_running_or_notify_cancel():
            return
        try:
            result = self._pool.submit(fn, *args, **kwargs).result() if forward else fn(*args, **kwargs)
        except BaseException as exc:  # handed to the caller through result(), like any executor
            fut.set_exception(exc)
        else:
            fut.set_result(result)

    def shutdown(self, wait: bool = True, *, cancel_futures: bool = False) -> None:
        with self._ready:
            if not self._stopped:
                self._stopped = True
                if cancel_futures:
                    for item in self._queue:
                        if item is not None:
                            item[0].cancel()
                self._queue.append(None)
                self._ready.notify_all()
        if wait:
            for t in self._threads:
                t.join()
        self._pool.shutdown(wait=wait, cancel_futures=cancel_futures)
