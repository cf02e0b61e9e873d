"""Split statistics: sizes, document lengths, unknown-token rate, coverage, Zipf fit
(:mod:`seqpipe.report.zipf`).

All figures are computed from per-id counts (one ``np.bincount`` per split) and the
documents table; none needs a pass in Python over tokens.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Final

import numpy as np

from seqpipe.report.corpus import Roles, SplitShape, SplitTokens
from seqpipe.report.zipf import MIN_TAIL, ZipfFit, fit_power_law
from seqpipe.vocab import Vocabulary

COVERAGE_KS: Final = (1, 10, 100, 1000, 10000)


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


ALPHABET_SKIP: Final = (
    "not fitted: every vocabulary entry other than the reserved ones is a single character or byte; "
    "such a closed alphabet of a few hundred symbols has no power-law tail to fit"
)
TOO_FEW_TYPES: Final = f"not fitted: fewer than {MIN_TAIL} token types, too few to tell a power law from noise"


def is_alphabet(vocab: Vocabulary) -> bool:
    """True when every non-reserved entry is one byte or one UTF-8 character (a character or
    byte tokenizer's vocabulary). One pass over the vocabulary, stopping at the first longer entry."""
    for i in range(int(vocab.n_reserved), len(vocab)):
        token = vocab.token(i)
        if len(token) > 1 and len(token.decode("utf-8", "replace")) != 1:
            return False
    return True


def zipf_figures(counts: np.ndarray, ranking: np.ndarray, alphabet: bool) -> tuple[dict[str, Any], ZipfFit | None]:
    """The report's Zipf entry for one split (the fit, or why there is none) and the fit itself."""
    if alphabet:
        return {"skipped": ALPHABET_SKIP}, None
    fit = fit_power_law(counts[ranking])
    if fit is None:
        return {"skipped": TOO_FEW_TYPES}, None
    return fit.as_dict(), fit


@dataclass(frozen=True, slots=True)
class RankCurve:
    """One split's rank-frequency curve for the plot: descending counts, their total, the fit."""

    counts: np.ndarray  # counts of the non-reserved ids that occur, most frequent first
    tokens: int  # the split's content tokens: counts / tokens compares splits of any size
    fit: ZipfFit | None


def split_stats(
    split: SplitShape | SplitTokens,
    counts: np.ndarray,
    roles: Roles,
    train_ranking: np.ndarray | None,
    zipf: dict[str, Any],
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
        "zipf": zipf,
    }


def vocabulary_use(counts: np.ndarray, roles: Roles, content: int) -> dict[str, Any]:
    """How a split uses its vocabulary: the unknown rate of its content tokens and the share of the
    vocabulary's non-reserved entries that occur in it (``entries_seen`` of ``entries``)."""
    entries = roles.vocab_size - roles.n_reserved
    seen = int(np.count_nonzero(counts[roles.n_reserved :]))
    unknown = int(counts[roles.unknown]) if roles.unknown is not None else 0
    return {
        "unknown_rate": unknown / content if content else None,
        "entries": entries,
        "entries_seen": seen,
        "coverage": seen / entries if entries else None,
    }
