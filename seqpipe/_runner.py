"""Running one phase's tasks on an executor, with a progress bar.

Results come back in task order, never completion order; a callback sees each as it arrives,
so a phase can fold results in without keeping them all.

On an executor whose tasks run elsewhere (a Dask cluster: see ``executors.task_slots``) every
submitted task costs a scheduler round trip and its own pickling, a few milliseconds, which a
corpus of thousands of small parts pays thousands of times; there consecutive tasks are sent
together as one ``Batch`` (a few per slot; the recipe they share is pickled once per batch),
and the bar, ``each`` and the results still see every original task.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import BrokenExecutor, Executor, Future
from dataclasses import dataclass
from typing import Any, Final, TypeVar

from seqpipe.errors import WorkerError
from seqpipe.executors import return_freed_memory, settle_remote_worker, task_slots
from seqpipe.progress import bar

WORKER_DIED: Final = (
    "a build worker process died without a result (killed by a signal, out of memory, or, when "
    'build(..., workers=N) runs from a script, a script without an `if __name__ == "__main__":` '
    "guard: each spawned worker imports the script and starts the build again); guard the script, "
    "check memory, then rerun the build"
)

M = TypeVar("M")

# batches per slot of a remote executor: enough that a slow batch leaves the other slots work
# to take, few enough that per-task costs are paid dozens of times per phase, not thousands
BATCHES_PER_SLOT: Final = 8


@dataclass(frozen=True, slots=True)
class Batch:
    """One task submitted to a remote executor: sets up the process it lands in (once), then
    runs ``fn`` over several tasks, in order, and returns their results."""

    fn: Callable[[Any], Any]

    def __call__(self, tasks: Sequence[Any]) -> list[Any]:
        settle_remote_worker()
        return [self.fn(t) for t in tasks]


def batch_ranges(count: int, weights: Sequence[int] | None, slots: int | None) -> list[range]:
    """Consecutive runs of ``count`` tasks, one per submitted task: each alone without ``slots``
    (an executor in this process) or when they are few, else about ``BATCHES_PER_SLOT`` runs per
    slot of equal weight (``weights``, else equal per task); a task heavier than a run's share
    makes a run of its own."""
    if not slots or count <= slots * BATCHES_PER_SLOT:
        return [range(i, i + 1) for i in range(count)]
    w = list(weights) if weights is not None and sum(weights) > 0 else [1] * count
    share = sum(w) / (slots * BATCHES_PER_SLOT)
    runs: list[range] = []
    start, held = 0, 0
    for i, x in enumerate(w):
        if held and held + x > share:  # the run is full without this task
            runs.append(range(start, i))
            start, held = i, 0
        held += x
        if held >= share:
            runs.append(range(start, i + 1))
            start, held = i + 1, 0
    if start < count:
        runs.append(range(start, count))
    return runs


@dataclass(frozen=True, slots=True)
class View:
    """How a phase shows its progress: a bar counting tasks (or their ``weights``), and
    optionally a running total of a figure each result carries (``tally``: label, getter)."""

    desc: str
    unit: str = "part"
    weights: Sequence[int] | None = None
    tally: tuple[str, Callable[[Any], int]] | None = None


class _Ticker:
    """A phase's bar and its running total: O(1) per finished task, nothing when bars are off."""

    def __init__(self, pbar: Any, view: View, show: bool) -> None:
        self.pbar = pbar
        self.view = view
        self.show = show
        self.total = 0

    def tick(self, i: int, value: Any) -> None:
        if not self.show:
            return
        self.pbar.update(self.view.weights[i] if self.view.weights is not None else 1)
        if self.view.tally is not None:
            label, figure = self.view.tally
            self.total += figure(value)
            self.pbar.set_postfix({label: self.total}, refresh=False)


def _nothing() -> None:
    return None


def run(
    executor: Executor,
    show: bool,
    fn: Callable[[Any], Any],
    tasks: Sequence[Any],
    view: View,
    each: Callable[[int, Any], Any] | None = None,
    started: Mapping[int, Future[Any]] | None = None,
) -> list[Any]:
    """Submit every task, wait for all, return results in task order (never completion order).

    ``each(i, result)`` sees every result as it arrives (in completion order) and returns what
    is kept in its place, so large parts of results need not pile up; a result that is ready at
    submit time (an inline executor) is taken at once. ``started``: tasks already submitted to
    ``executor`` (by task number; an executor of this process), taken as they are."""
    return run_beside(executor, show, fn, tasks, view, _nothing, each, started)[0]


def run_beside(
    executor: Executor,
    show: bool,
    fn: Callable[[Any], Any],
    tasks: Sequence[Any],
    view: View,
    meanwhile: Callable[[], M],
    each: Callable[[int, Any], Any] | None = None,
    started: Mapping[int, Future[Any]] | None = None,
) -> tuple[list[Any], M]:
    """``run``, and ``meanwhile()``: this thread's own work, done after every task is
    submitted and before waiting for them; returns its result too."""
    from concurrent.futures import as_completed, wait

    futures: dict[Future[Any], range] = {}
    results: list[Any] = [None] * len(tasks)
    total = sum(view.weights) if view.weights is not None else len(tasks)
    shown = show and bool(tasks)
    slots = task_slots(executor) if tasks else None
    batched = Batch(fn) if slots is not None else None
    started = started or {}
    if started and batched is not None:
        raise ValueError("tasks started beforehand are only taken from an executor of this process")
    with bar(total, view.desc, unit=view.unit, show=shown, unit_scale=view.weights is not None) as pbar:
        ticker = _Ticker(pbar, view, shown)
        try:
            for run_ in batch_ranges(len(tasks), view.weights, slots):
                if run_.start in started:
                    fut = started[run_.start]
                elif batched is None:
                    fut = executor.submit(fn, tasks[run_.start])
                else:
                    fut = executor.submit(batched, [tasks[i] for i in run_])
                if fut.done():
                    _take(fut, run_, batched is not None, results, each, ticker)
                else:
                    futures[fut] = run_
            beside = meanwhile()
            for fut in as_completed(list(futures)):
                # dropped once taken: a Dask worker keeps a result while its future is referenced
                _take(fut, futures.pop(fut), batched is not None, results, each, ticker)
        except Exception:
            # the tasks still running finish before the error reaches the caller, which may
            # remove the directory they write into (a failed build's stage); an interrupt
            # does not wait
            for fut in futures:
                fut.cancel()
            wait(list(futures))
            raise
    return_freed_memory()  # what this phase's tasks freed here, before the next phase starts
    return results, beside


def _take(
    fut: Future[Any],
    run_: range,
    batched: bool,
    results: list[Any],
    each: Callable[[int, Any], Any] | None,
    ticker: _Ticker,
) -> None:
    """Store a finished task's result (a batch's: each of its tasks' results) in ``results``."""
    try:
        value = fut.result()
    except BrokenExecutor as exc:
        raise WorkerError(WORKER_DIED, cause=type(exc).__name__) from exc
    values = value if batched else [value]
    for i, v in zip(run_, values, strict=True):
        results[i] = each(i, v) if each is not None else v
        ticker.tick(i, v)
