"""Split statistics: sizes, document lengths, unknown-token rate, coverage, Zipf fit.

All figures are computed from per-id counts (one ``np.bincount`` per split) and the
documents table; none needs a pass in Python over tokens.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Final

import numpy as np

from seqpipe.report.corpus import Roles, SplitTokens

COVERAGE_KS: Final = (1, 10, 100, 1000, 10000)
ZIPF_MAX_RANK: Final = 1000


def id_counts(split: SplitTokens, vocab_size: int) -> np.ndarray:
    """Occurrences of each id among the split's content tokens (markers excluded)."""
    return np.bincount(split.content_ids(), minlength=vocab_size).astype(np.int64)


def frequency_ranking(counts: np.ndarray, n_reserved: int) -> np.ndarray:
    """Non-reserved ids with a nonzero count, most frequent first (ties by id)."""
    ordinary = counts[n_reserved:]
    order = np.argsort(-ordinary, kind="stable")
    order = order[ordinary[order] > 0]
    return order + n_reserved


def length_summary(lengths: np.ndarray) -> dict[str, float | int | None]:
    """Min, median, 95th percentile (linear interpolation) and max of document lengths."""
    if len(lengths) == 0:
        return {"min": None, "median": None, "p95": None, "max": None}
    return {
        "min": int(lengths.min()),
        "median": float(np.median(lengths)),
        "p95": float(np.percentile(lengths, 95)),
        "max": int(lengths.max()),
    }


@dataclass(frozen=True, slots=True)
class ZipfFit:
    """Least squares of log frequency on log rank over ranks ``1..ranks``."""

    exponent: float  # minus the slope
    intercept: float  # natural log of the fitted frequency at rank 1
    r_squared: float
    ranks: int

    def as_dict(self) -> dict[str, Any]:
        return {
            "exponent": self.exponent,
            "intercept": self.intercept,
            "r_squared": self.r_squared,
            "ranks": self.ranks,
        }


def zipf_fit(frequencies: np.ndarray, max_rank: int = ZIPF_MAX_RANK) -> ZipfFit | None:
    """Fit ``log f = a - s log r`` to descending ``frequencies``; None with fewer than 2 ranks."""
    f = np.asarray(frequencies, dtype=np.float64)[:max_rank]
    f = f[f > 0]
    if len(f) < 2:
        return None
    x = np.log(np.arange(1, len(f) + 1, dtype=np.float64))
    y = np.log(f)
    xc, yc = x - x.mean(), y - y.mean()
    slope = float((xc * yc).sum() / (xc * xc).sum())
    intercept = float(y.mean() - slope * x.mean())
    total = float((yc * yc).sum())
    resid = float(((yc - slope * xc) ** 2).sum())
    r2 = 1.0 - resid / total if total > 0 else 1.0
    return ZipfFit(exponent=-slope, intercept=intercept, r_squared=r2, ranks=len(f))


def split_stats(
    split: SplitTokens, counts: np.ndarray, roles: Roles, train_ranking: np.ndarray | None
) -> dict[str, Any]:
    """Every per-split figure of the report (see the module docstring)."""
    content = int(split.content_lengths.sum())
    distinct = int(np.count_nonzero(counts))
    unknown = int(counts[roles.unknown]) if roles.unknown is not None else 0
    coverage: dict[str, float | None] = {}
    if train_ranking is not None:
        # shares of this split's content tokens taken by the k most frequent train ids
        covered = np.cumsum(counts[train_ranking])
        for k in COVERAGE_KS:
            if k <= len(train_ranking):
                coverage[str(k)] = float(covered[k - 1]) / content if content else None
        if len(train_ranking) and str(len(train_ranking)) not in coverage:
            coverage[str(len(train_ranking))] = float(covered[-1]) / content if content else None
    ranking = frequency_ranking(counts, roles.n_reserved)
    fit = zipf_fit(counts[ranking])
    return {
        "documents": split.num_documents,
        "tokens": split.num_tokens,
        "content_tokens": content,
        "distinct_tokens": distinct,
        "document_length": length_summary(split.lengths),
        "empty_documents": int(np.count_nonzero(split.content_lengths == 0)),
        "unknown_tokens": unknown,
        "unknown_rate": unknown / content if content else None,
        "coverage": coverage,
        "zipf": fit.as_dict() if fit else None,
    }
