"""Shared pieces of the benchmark parts: the Measure record and a best-of timer."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Measure:
    """One benchmark line. ``ratio`` is measured in the same run as its baseline.

    ``higher_is_better``: the target is a floor (ratio >= target); otherwise a ceiling.
    """

    name: str
    ratio: float
    target: float
    detail: str
    higher_is_better: bool = True

    @property
    def met(self) -> bool:
        return self.ratio >= self.target if self.higher_is_better else self.ratio <= self.target

    def line(self) -> str:
        op = ">=" if self.higher_is_better else "<="
        flag = "" if self.met else "  MISSED"
        return f"{self.name}: {self.ratio:.3g} (target {op} {self.target:g}) {self.detail}{flag}"


def best_time(fn: Callable[[], Any], repeat: int = 3) -> float:
    """Fastest wall time of ``repeat`` calls (seconds): the least disturbed run."""
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def best_times(fns: Sequence[Callable[[], Any]], repeat: int = 5) -> list[float]:
    """Fastest wall time of each of ``fns`` over ``repeat`` rounds that call them in turn: a
    slow spell of the machine then hits every side of a ratio alike, not only one of them."""
    best = [float("inf")] * len(fns)
    for _ in range(repeat):
        for i, fn in enumerate(fns):
            t0 = time.perf_counter()
            fn()
            best[i] = min(best[i], time.perf_counter() - t0)
    return best
