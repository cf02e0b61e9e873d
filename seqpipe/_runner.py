"""Running one phase's tasks on an executor, with a progress bar.

Results come back in task order, never completion order; a callback sees each as it arrives,
so a phase can fold results in without keeping them all.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from concurrent.futures import BrokenExecutor, Executor, Future
from dataclasses import dataclass
from typing import Any, Final, TypeVar

from seqpipe.errors import WorkerError
from seqpipe.progress import bar

WORKER_DIED: Final = (
    "a build worker process died without a result (killed by a signal, out of memory, or, when "
    'build(..., workers=N) runs from a script, a script without an `if __name__ == "__main__":` '
    "guard: each spawned worker imports the script and starts the build again); guard the script, "
    "check memory, then rerun the build"
)

M = TypeVar("M")


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
) -> list[Any]:
    """Submit every task, wait for all, return results in task order (never completion order).

    ``each(i, result)`` sees every result as it arrives (in completion order) and returns what
    is kept in its place, so large parts of results need not pile up; a result that is ready at
    submit time (an inline executor) is taken at once."""
    return run_beside(executor, show, fn, tasks, view, _nothing, each)[0]


def run_beside(
    executor: Executor,
    show: bool,
    fn: Callable[[Any], Any],
    tasks: Sequence[Any],
    view: View,
    meanwhile: Callable[[], M],
    each: Callable[[int, Any], Any] | None = None,
) -> tuple[list[Any], M]:
    """``run``, and ``meanwhile()``: this thread's own work, done after every task is
    submitted and before waiting for them; returns its result too."""
    from concurrent.futures import as_completed

    futures: dict[Future[Any], int] = {}
    results: list[Any] = [None] * len(tasks)
    total = sum(view.weights) if view.weights is not None else len(tasks)
    shown = show and bool(tasks)
    with bar(total, view.desc, unit=view.unit, show=shown, unit_scale=view.weights is not None) as pbar:
        ticker = _Ticker(pbar, view, shown)
        for i, t in enumerate(tasks):
            fut = executor.submit(fn, t)
            if fut.done():
                results[i] = _take(fut, i, each, ticker)
            else:
                futures[fut] = i
        beside = meanwhile()
        for fut in as_completed(list(futures)):
            i = futures[fut]
            results[i] = _take(fut, i, each, ticker)
    return results, beside


def _take(fut: Future[Any], i: int, each: Callable[[int, Any], Any] | None, ticker: _Ticker) -> Any:
    try:
        value = fut.result()
    except BrokenExecutor as exc:
        raise WorkerError(WORKER_DIED, cause=type(exc).__name__) from exc
    kept = each(i, value) if each is not None else value
    ticker.tick(i, value)
    return kept
