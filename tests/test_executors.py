"""The build's own executors: results, errors and ordering through every kind of consumer.

Contract: ``concurrent.futures.Executor`` as the Python standard library documents it
(submit returns a Future; result() returns the value or raises the task's exception;
shutdown(wait=True) finishes the work already submitted).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor, as_completed
from pathlib import Path
from typing import Any

import pytest

from seqpipe.executors import SharedQueueExecutor, executor_for

REPO = Path(__file__).resolve().parent.parent


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


def _children(pid: int) -> set[int]:
    """Pids whose parent is ``pid`` (Linux /proc)."""
    found = set()
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat", encoding="ascii", errors="replace") as fh:
                    fields = fh.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid:  # field 4 of proc_pid_stat(5): the parent pid
                found.add(int(entry))
    return found


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def _wait_for(check: Any, timeout: float) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if check():
            return True
        time.sleep(0.1)
    return check()


def _start_slow_build(tmp_path: Path) -> tuple[subprocess.Popen[bytes], set[int]]:
    """A `seqpipe build --workers 2` whose worker spends long on its first task; returns the
    process and its children (the spawned worker and the resource tracker) once they exist."""
    from seqpipe.demo import demo_recipe_text, write_demo_corpus

    write_demo_corpus(tmp_path, documents=3000)
    (tmp_path / "recipe.toml").write_text(demo_recipe_text(), encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": str(REPO), "SEQPIPE_TASK_THREADS": "1"}
    cmd = [sys.executable, "-m", "seqpipe.cli", "build", "recipe.toml", "-o", "out", "--workers", "2", "--quiet"]
    proc = subprocess.Popen(cmd, cwd=tmp_path, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    assert _wait_for(lambda: len(_children(proc.pid)) >= 2 or proc.poll() is not None, 60)
    kids = _children(proc.pid)
    if proc.poll() is not None or not kids:
        pytest.skip("the build finished before its workers could be seen")
    return proc, kids


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="reads /proc (Linux)")
def test_killed_build_leaves_no_orphans(tmp_path: Path) -> None:
    """kill -9 of a two-worker build: its spawned worker and resource tracker exit on their own."""
    proc, kids = _start_slow_build(tmp_path)
    proc.send_signal(signal.SIGKILL)
    proc.wait(30)
    assert _wait_for(lambda: not any(_alive(k) for k in kids), 60), [k for k in kids if _alive(k)]


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="reads /proc (Linux)")
def test_terminated_build_cleans_up_like_an_interrupt(tmp_path: Path) -> None:
    """SIGTERM to a two-worker build stops it as Ctrl-C does (exit 143, 128 + SIGTERM), and leaves no worker behind."""
    proc, kids = _start_slow_build(tmp_path)
    proc.send_signal(signal.SIGTERM)
    code = proc.wait(120)
    if code == 0:
        pytest.skip("the build finished before the signal arrived")
    assert code == 143
    assert _wait_for(lambda: not any(_alive(k) for k in kids), 60), [k for k in kids if _alive(k)]


_FREED = """
import re
from pathlib import Path
from seqpipe.executors import return_freed_memory

def anon():
    return int(re.search(r"RssAnon:\\s+(\\d+)", Path("/proc/self/status").read_text()).group(1))

blocks = [bytearray(64 << 10) for _ in range(1024)]  # 64 MiB of heap blocks, each written
del blocks[:-1]  # all freed but the last, which keeps the heap's top where it is
before = anon()
return_freed_memory()
print(before - anon())
"""


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads RssAnon from Linux's /proc")
def test_freed_heap_pages_go_back_to_the_kernel() -> None:
    """Blocks below glibc's mmap threshold (128 KiB by default) come from the heap; freed in its
    middle, their pages stay resident until ``malloc_trim`` hands back the whole free pages
    (glibc's malloc_trim(3) manual page, since glibc 2.8). In a fresh interpreter, so the heap
    holds what the test put there."""
    if sys.platform != "linux" or not os.confstr("CS_GNU_LIBC_VERSION"):
        pytest.skip("malloc_trim is glibc's")
    env = dict(os.environ, PYTHONPATH=str(REPO))
    done = subprocess.run([sys.executable, "-c", _FREED], env=env, capture_output=True, text=True, check=True)
    assert int(done.stdout.strip()) >= 48 << 10  # KiB: most of the 64 MiB freed


_ARROW_FREED = """
import re
from pathlib import Path
import numpy as np
import pyarrow as pa
from seqpipe.executors import return_freed_memory

def anon():
    return int(re.search(r"RssAnon:\\s+(\\d+)", Path("/proc/self/status").read_text()).group(1))

whole = pa.concat_arrays([pa.array(np.arange(1 << 20, dtype=np.int64) + i) for i in range(8)])  # 64 MiB
del whole
before = anon()
return_freed_memory()
print(before - anon(), pa.total_allocated_bytes())
"""


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads RssAnon from Linux's /proc")
def test_freed_arrow_pool_pages_go_back_to_the_kernel() -> None:
    """Arrow's default pool, mimalloc, keeps the pages of freed buffers for reuse until the pool's
    ``release_unused`` (Arrow's MemoryPool::ReleaseUnused, which asks mimalloc to collect;
    mimalloc's mi_collect(force) documentation). In a fresh interpreter, so the pool holds
    what the test put there."""
    import pyarrow as pa

    if pa.default_memory_pool().backend_name != "mimalloc":
        pytest.skip("the retention checked here is mimalloc's")
    env = dict(os.environ, PYTHONPATH=str(REPO))
    done = subprocess.run([sys.executable, "-c", _ARROW_FREED], env=env, capture_output=True, text=True, check=True)
    returned, live = (int(x) for x in done.stdout.split())
    assert live == 0  # nothing of the 64 MiB was still in use
    assert returned >= 48 << 10  # KiB: most of the 64 MiB freed


def test_this_process_returns_freed_memory_after_each_task_it_runs(monkeypatch: pytest.MonkeyPatch) -> None:
    """The build's own process trims after each task it takes itself (its anonymous memory then
    no longer climbs with the number of tasks it ran); a task forwarded to the pool is trimmed,
    if at all, where it ran."""
    import seqpipe.executors as executors

    calls: list[str] = []
    monkeypatch.setattr(executors, "return_freed_memory", lambda: calls.append(threading.current_thread().name))
    monkeypatch.setattr(executors, "_KEEPING", [])  # as in a library caller's process
    ex = SharedQueueExecutor(ThreadPoolExecutor(1), 0, local=1)  # the local thread only
    assert [f.result(timeout=10) for f in [ex.submit(square, i) for i in range(5)]] == [0, 1, 4, 9, 16]
    ex.shutdown()
    assert len(calls) == 5 and all(name.startswith("seqpipe-local") for name in calls)
    calls.clear()
    ex = SharedQueueExecutor(ThreadPoolExecutor(1), 1, local=0)  # the pool's proxy only
    assert [f.result(timeout=10) for f in [ex.submit(square, i) for i in range(5)]] == [0, 1, 4, 9, 16]
    ex.shutdown()
    assert calls == []
    # a process that keeps freed memory on purpose (the command line) keeps it after its tasks
    monkeypatch.setattr(executors, "_KEEPING", [True])
    ex = SharedQueueExecutor(ThreadPoolExecutor(1), 0, local=1)
    assert [f.result(timeout=10) for f in [ex.submit(square, i) for i in range(3)]] == [0, 1, 4]
    ex.shutdown()
    assert calls == []
