"""The build's own executors: results, errors and ordering through every kind of consumer.

Contract: ``concurrent.futures.Executor`` as the Python standard library documents it
(submit returns a Future; result() returns the value or raises the task's exception;
shutdown(wait=True) finishes the work already submitted).
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor, as_completed

import pytest

from seqpipe.executors import SharedQueueExecutor, executor_for


def square(x: int) -> int:
    return x * x


def fail(x: int) -> int:
    raise ValueError(f"task {x} fails")


def where(_: int) -> str:
    return threading.current_thread().name


def test_results_match_their_submissions() -> None:
    ex = SharedQueueExecutor(ThreadPoolExecutor(2), 2, local=1)
    futures = {ex.submit(square, i): i for i in range(200)}
    got = {futures[f]: f.result() for f in as_completed(futures)}
    ex.shutdown()
    assert got == {i: i * i for i in range(200)}


def test_a_task_error_reaches_the_caller_and_others_still_run() -> None:
    ex = SharedQueueExecutor(ThreadPoolExecutor(1), 1, local=1)
    bad = [ex.submit(fail, i) for i in range(3)]
    good = [ex.submit(square, i) for i in range(3)]
    for f in bad:
        with pytest.raises(ValueError, match="fails"):
            f.result()
    assert [f.result() for f in good] == [0, 1, 4]
    ex.shutdown()


def test_local_and_pool_consumers_work_at_the_same_time() -> None:
    """Two tasks that each wait for the other can only finish if two consumers run at once:
    the local thread and the pool's proxy."""
    barrier = threading.Barrier(2, timeout=10)

    def meet(_: int) -> str:
        barrier.wait()
        return threading.current_thread().name

    ex = SharedQueueExecutor(ThreadPoolExecutor(1, thread_name_prefix="pool"), 1, local=1)
    names = sorted(f.result(timeout=20) for f in [ex.submit(meet, 0), ex.submit(meet, 1)])
    ex.shutdown()
    assert names[0].startswith("pool") and names[1].startswith("seqpipe-local")


def test_shutdown_finishes_submitted_work_then_refuses_more() -> None:
    ex = SharedQueueExecutor(ThreadPoolExecutor(1), 1, local=1)
    futures = [ex.submit(square, i) for i in range(50)]
    ex.shutdown(wait=True)
    assert all(f.done() for f in futures)
    with pytest.raises(RuntimeError, match="shut down"):
        ex.submit(square, 1)


def ids(_: int) -> tuple[int, int]:
    import time

    time.sleep(0.02)
    return os.getpid(), os.getppid()


def test_two_workers_means_this_process_and_one_spawned() -> None:
    """--workers 2: tasks run here and in at most one process spawned by this one."""
    with executor_for(None, 2) as ex:
        seen = {f.result() for f in [ex.submit(ids, i) for i in range(100)]}
    here = os.getpid()
    assert (here, os.getppid()) in seen  # this process takes tasks from the start
    others = {pid for pid, parent in seen if pid != here}
    assert len(others) <= 1 and all(parent == here for pid, parent in seen if pid != here)


def test_cancelling_shutdown_drops_queued_tasks() -> None:
    """shutdown(cancel_futures=True) runs no task still waiting in the queue (a failed build
    stops promptly instead of finishing every remaining part)."""
    started = threading.Event()
    release = threading.Event()

    def hold(_: int) -> int:
        started.set()
        release.wait(10)
        return 1

    ex = SharedQueueExecutor(ThreadPoolExecutor(1), 0, local=1)  # one consumer: the local thread
    first = ex.submit(hold, 0)
    started.wait(10)
    queued = [ex.submit(square, i) for i in range(20)]
    ex.shutdown(wait=False, cancel_futures=True)  # while the only consumer is still busy
    release.set()
    assert first.result(timeout=10) == 1
    assert all(f.cancelled() for f in queued)


def blas_setting(_: int) -> tuple[str | None, int]:
    """The worker's OPENBLAS_NUM_THREADS and its thread count with numpy imported (Linux)."""
    import numpy  # noqa: F401  (its OpenBLAS starts its threads at import)

    with open("/proc/self/status") as f:
        threads = next(int(line.split()[1]) for line in f if line.startswith("Threads:"))
    return os.environ.get("OPENBLAS_NUM_THREADS"), threads


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="reads /proc (Linux)")
def test_spawned_workers_start_one_blas_thread_and_the_caller_keeps_its_environment(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """OpenBLAS reads OPENBLAS_NUM_THREADS at import (its documented setting): a worker
    spawned by the build gets 1, so no idle BLAS threads spin beside the tasks."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    from seqpipe.executors import worker_environment

    for name in ("OPENBLAS_NUM_THREADS", "GOTO_NUM_THREADS", "OMP_NUM_THREADS"):
        monkeypatch.delenv(name, raising=False)
    spawn = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(1, mp_context=spawn) as plain:
        _, threads_default = plain.submit(blas_setting, 0).result()
    with ProcessPoolExecutor(1, mp_context=spawn) as pool:
        with worker_environment():
            fut = pool.submit(blas_setting, 0)
        assert "OPENBLAS_NUM_THREADS" not in os.environ
        setting, threads = fut.result()
    assert setting == "1"
    if os.cpu_count() and os.cpu_count() > 1:  # one thread per core otherwise
        assert threads < threads_default
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "3")  # the caller's own setting is left alone
    with ProcessPoolExecutor(1, mp_context=spawn) as pool:
        with worker_environment():
            fut = pool.submit(blas_setting, 0)
        assert fut.result()[0] == "3"


def die(_: int) -> int:
    """A task whose worker process ends at once, without a result or a Python error."""
    os._exit(9)


def test_a_dead_worker_is_a_worker_error() -> None:
    """A worker process that dies mid-build surfaces as WorkerError (exit code 6), not BrokenProcessPool."""
    from seqpipe._runner import View, run
    from seqpipe.errors import WorkerError
    from seqpipe.executors import process_pool

    pool = process_pool(1, threads=1)
    shared = SharedQueueExecutor(pool, 1, local=0)
    try:
        with pytest.raises(WorkerError, match="__main__") as caught:
            run(shared, False, die, [1, 2], View("test"))
    finally:
        shared.shutdown(wait=True, cancel_futures=True)
        pool.shutdown(wait=True)
    assert caught.value.exit_code == 6
