"""Running a phase's tasks: results in task order, and on a remote executor consecutive tasks sent
together as batches without the caller seeing any difference."""

from __future__ import annotations

import threading
from collections.abc import Callable
from concurrent.futures import Executor, Future, ThreadPoolExecutor
from typing import Any

import pytest

from seqpipe._runner import BATCHES_PER_SLOT, Batch, View, batch_ranges, run, run_beside
from seqpipe.executors import InlineExecutor, task_slots


def square(x: int) -> int:
    return x * x


def fail_on_seven(x: int) -> int:
    if x == 7:
        raise ValueError("task 7 fails")
    return x


class Remote(Executor):
    """A thread pool that says it runs ``slots`` tasks at once elsewhere; records what it was sent."""

    def __init__(self, slots: int | None) -> None:
        self.task_slots = slots
        self.inner = ThreadPoolExecutor(2)
        self.sent: list[tuple[Callable[..., Any], Any]] = []
        self.lock = threading.Lock()

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        with self.lock:
            self.sent.append((fn, args[0]))
        return self.inner.submit(fn, *args, **kwargs)

    def shutdown(self, wait: bool = True, *, cancel_futures: bool = False) -> None:
        self.inner.shutdown(wait=wait, cancel_futures=cancel_futures)


def test_without_slots_every_task_is_its_own_run() -> None:
    """An executor of this process (no slots) gets one submission per task."""
    assert batch_ranges(5, None, None) == [range(i, i + 1) for i in range(5)]


def test_few_tasks_are_not_batched() -> None:
    """Up to BATCHES_PER_SLOT tasks per slot stay single, so no slot waits behind a batch."""
    assert batch_ranges(2 * BATCHES_PER_SLOT, None, 2) == [range(i, i + 1) for i in range(2 * BATCHES_PER_SLOT)]


def test_many_tasks_make_consecutive_runs_covering_each_task_once() -> None:
    """1,000 tasks on 2 slots: about BATCHES_PER_SLOT runs per slot, consecutive, covering every task once."""
    runs = batch_ranges(1000, None, 2)
    assert [i for r in runs for i in r] == list(range(1000))
    assert all(len(r) > 0 for r in runs)
    assert 2 * BATCHES_PER_SLOT - 1 <= len(runs) <= 2 * BATCHES_PER_SLOT + 1


def test_a_heavy_task_makes_a_run_of_its_own() -> None:
    """Runs are cut by weight: a task worth more than a run's share is sent alone."""
    weights = [1] * 100 + [10_000] + [1] * 100
    runs = batch_ranges(len(weights), weights, 1)
    assert runs[1] == range(100, 101)
    assert [i for r in runs for i in r] == list(range(len(weights)))


def test_task_slots_reads_the_executor_and_is_none_for_local_ones() -> None:
    """An executor's own task_slots (a number or a method) is used; thread pools have none."""
    with ThreadPoolExecutor(1) as pool:
        assert task_slots(pool) is None
    assert task_slots(InlineExecutor()) is None
    remote = Remote(3)
    assert task_slots(remote) == 3
    remote.task_slots = None
    assert task_slots(remote) is None
    remote.shutdown()

    class Asking(InlineExecutor):
        def task_slots(self) -> int:
            return 4

    assert task_slots(Asking()) == 4


def test_batched_results_arrive_in_task_order_and_each_sees_every_task() -> None:
    """On a remote executor the results and the ``each`` calls are those of single tasks, with
    far fewer submissions than tasks."""
    remote = Remote(2)
    seen: list[int] = []
    got = run(remote, False, square, list(range(500)), View("test"), each=lambda i, v: seen.append(i) or v + 1)
    remote.shutdown()
    assert got == [i * i + 1 for i in range(500)]
    assert sorted(seen) == list(range(500))
    assert len(remote.sent) <= 2 * BATCHES_PER_SLOT + 1
    assert all(isinstance(fn, Batch) and fn.fn is square for fn, _ in remote.sent)


def test_single_tasks_on_a_remote_executor_go_through_a_batch() -> None:
    """Few tasks on a remote executor: one per submission, still wrapped (the worker is set up)."""
    remote = Remote(4)
    got = run(remote, False, square, [3, 4], View("test"))
    remote.shutdown()
    assert got == [9, 16]
    assert [args for _, args in remote.sent] == [[3], [4]]


def test_a_local_executor_gets_the_function_itself() -> None:
    """Without slots nothing is wrapped: each task is submitted as fn(task)."""
    remote = Remote(None)
    results, beside = run_beside(remote, False, square, [1, 2, 3], View("test"), lambda: "mine")
    remote.shutdown()
    assert (results, beside) == ([1, 4, 9], "mine")
    assert [(fn, arg) for fn, arg in remote.sent] == [(square, 1), (square, 2), (square, 3)]


def test_a_failing_task_in_a_batch_fails_the_run() -> None:
    """The error of one task in a batch reaches the caller."""
    remote = Remote(1)
    with pytest.raises(ValueError, match="task 7 fails"):
        run(remote, False, fail_on_seven, list(range(100)), View("test"))
    remote.shutdown()


def test_a_failing_task_raises_only_once_every_running_task_has_finished() -> None:
    """When one task fails, run returns its error only after the tasks already running are done
    (so a caller that then removes their output directory leaves nothing behind)."""
    import time

    finished: list[int] = []

    def slow_or_failing(x: int) -> int:
        if x == 0:
            time.sleep(0.05)  # both tasks are running by now
            raise ValueError("task 0 fails")
        time.sleep(0.3)
        finished.append(x)
        return x

    with ThreadPoolExecutor(2) as pool:
        with pytest.raises(ValueError, match="task 0 fails"):
            run(pool, False, slow_or_failing, [0, 1], View("t"))
        assert finished == [1]
