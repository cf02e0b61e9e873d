"""Zipf's law fitted by maximum likelihood: the discrete power law of Clauset, Shalizi & Newman.

The data are the split's *token-type counts*: for every non-reserved id that occurs, the number of
times it occurs (``x``). Above a lower bound ``x_min`` these are modelled as a discrete power law,
``P(x) = x**-alpha / zeta(alpha, x_min)`` for integers ``x >= x_min``, with ``zeta`` the Hurwitz
zeta function (Clauset, Shalizi & Newman 2009, "Power-law distributions in empirical data", SIAM
Review 51(4), eq. 2.4 and 2.5). For each candidate ``x_min``, ``alpha`` maximises the exact
log-likelihood ``-n ln zeta(alpha, x_min) - alpha sum(ln x_i)`` (their eq. 3.5); ``x_min`` is the
candidate whose fitted law has the smallest Kolmogorov-Smirnov distance to the tail's empirical
distribution (their section 3.3). The standard error of ``alpha`` is ``(alpha - 1) / sqrt(n)``
(their eq. 3.2), ``n`` the number of types at or above ``x_min``.

Zipf's law in its rank form, "the frequency of the type of rank r falls as r**-s", is the same
statement about the tail: ``s = 1 / (alpha - 1)`` (Clauset et al., section 2 and appendix A, with
``alpha`` the exponent of the count distribution); English text gives ``alpha`` near 2, ``s``
near 1.

Why not a least-squares line through log frequency against log rank: the points are neither
independent nor equally noisy (the top ranks hold most tokens, the long tail holds most points),
so the line follows the many rare types and misses the head; Clauset et al. section 3.1 show such
fits are biased. scipy is not a dependency: the Hurwitz zeta function is summed here with an
Euler-Maclaurin tail and the likelihood maximised by golden-section search (it is concave in
``alpha``: ``ln zeta`` is convex).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Final

import numpy as np

MIN_TAIL: Final = 50  # types at or above x_min; fewer cannot tell a power law from noise
MAX_CANDIDATES: Final = 200  # smallest distinct counts tried as x_min (word counts put it low)
ALPHA_RANGE: Final = (1.0 + 1e-6, 12.0)
_TERMS: Final = 12  # terms summed before the Euler-Maclaurin tail
# B_2j / (2j)! for j = 1..5 (Bernoulli numbers B2 = 1/6, B4 = -1/30, B6 = 1/42, B8 = -1/30, B10 = 5/66)
_EM: Final = (1 / 12, -1 / 720, 1 / 30240, -1 / 1209600, 1 / 47900160)
_GOLDEN: Final = (math.sqrt(5) - 1) / 2


def hurwitz_zeta(s: np.ndarray | float, q: np.ndarray | float) -> np.ndarray:
    """``sum_{k>=0} (q + k)**-s`` for ``s > 1``, ``q >= 1`` (broadcast), to about 1e-12 relative.

    The first terms are summed; the rest is the Euler-Maclaurin formula at ``a = q + _TERMS``:
    ``a**(1-s)/(s-1) + a**-s/2 + sum_j B_2j/(2j)! s(s+1)..(s+2j-2) a**(-s-2j+1)``."""
    s_arr = np.asarray(s, dtype=np.float64)
    q_arr = np.asarray(q, dtype=np.float64)
    s_b, q_b = np.broadcast_arrays(s_arr, q_arr)
    k = np.arange(_TERMS, dtype=np.float64)
    head = ((q_b[..., None] + k) ** -s_b[..., None]).sum(axis=-1)
    a = q_b + _TERMS
    tail = a ** (1.0 - s_b) / (s_b - 1.0) + 0.5 * a**-s_b
    rising = s_b.copy()  # s (s+1) ... (s+2j-2)
    power = a ** (-s_b - 1.0)
    for j, coef in enumerate(_EM, start=1):
        tail = tail + coef * rising * power
        rising = rising * (s_b + 2 * j - 1) * (s_b + 2 * j)
        power = power / (a * a)
    out: np.ndarray = head + tail
    return out


def _fit_alphas(x_min: np.ndarray, n: np.ndarray, log_sum: np.ndarray) -> np.ndarray:
    """The maximum-likelihood alpha for each (x_min, n, sum ln x) row, by golden-section search."""
    lo = np.full(len(x_min), ALPHA_RANGE[0])
    hi = np.full(len(x_min), ALPHA_RANGE[1])

    def neg_ll(alpha: np.ndarray) -> np.ndarray:
        out: np.ndarray = n * np.log(hurwitz_zeta(alpha, x_min)) + alpha * log_sum
        return out

    c = hi - _GOLDEN * (hi - lo)
    d = lo + _GOLDEN * (hi - lo)
    fc, fd = neg_ll(c), neg_ll(d)
    for _ in range(90):  # the bracket shrinks by 0.618 per step: 90 steps reach float precision
        left = fc < fd  # the minimum lies in [lo, d]
        hi = np.where(left, d, hi)
        lo = np.where(left, lo, c)
        new = np.where(left, hi - _GOLDEN * (hi - lo), lo + _GOLDEN * (hi - lo))
        c, d = np.where(left, new, d), np.where(left, c, new)
        f_new = neg_ll(new)
        fc, fd = np.where(left, f_new, fd), np.where(left, fc, f_new)
    out: np.ndarray = (lo + hi) / 2
    return out


def ks_distance(values: np.ndarray, weights: np.ndarray, alpha: float, x_min: int) -> float:
    """Largest gap between the empirical CDF of the counts ``values`` (distinct, ascending, each
    held by ``weights`` types, all ``>= x_min``) and the fitted law's CDF, over every integer.

    Between two data values the empirical CDF is flat and the model's rises, so the largest gap
    on that stretch is at one of its ends: the model is evaluated at each value and just before
    the next one."""
    emp = np.cumsum(weights) / weights.sum()
    norm = hurwitz_zeta(alpha, float(x_min))
    at = 1.0 - hurwitz_zeta(alpha, values + 1.0) / norm  # model CDF at each value
    before_next = 1.0 - hurwitz_zeta(alpha, values[1:]) / norm  # at next value - 1
    below = 1.0 - hurwitz_zeta(alpha, float(values[0])) / norm  # model CDF at the first value - 1
    gaps = np.concatenate([np.abs(emp - at), [below]])
    if len(before_next):
        gaps = np.concatenate([gaps, np.abs(emp[:-1] - before_next)])
    return float(gaps.max())


@dataclass(frozen=True, slots=True)
class ZipfFit:
    """A discrete power law fitted to the token-type counts at or above ``x_min``."""

    alpha: float  # exponent of the count distribution P(x) ~ x**-alpha
    x_min: int
    types: int  # n: types whose count is >= x_min
    tokens: int  # tokens those types hold
    ks_distance: float
    x_min_chosen: bool  # True: x_min chosen by the KS method; False: given

    @property
    def standard_error(self) -> float:
        """``(alpha - 1) / sqrt(n)`` (Clauset et al. eq. 3.2)."""
        return (self.alpha - 1.0) / math.sqrt(self.types)

    @property
    def rank_exponent(self) -> float:
        """``s`` of the rank form ``f(r) ~ r**-s``: ``1 / (alpha - 1)``."""
        return 1.0 / (self.alpha - 1.0)

    def rank_line(self, ranks: np.ndarray) -> np.ndarray:
        """Counts the fitted law gives ranks ``1..types``: the type of rank ``r`` has about the count
        ``x`` with ``n (x / x_min)**(1 - alpha) = r`` (types with a count at least ``x``)."""
        out: np.ndarray = self.x_min * (np.asarray(ranks, dtype=np.float64) / self.types) ** -self.rank_exponent
        return out

    def as_dict(self) -> dict[str, Any]:
        return {
            "alpha": self.alpha,
            "standard_error": self.standard_error,
            "rank_exponent": self.rank_exponent,
            "x_min": self.x_min,
            "x_min_method": "ks" if self.x_min_chosen else "fixed",
            "types": self.types,
            "tokens": self.tokens,
            "ks_distance": self.ks_distance,
        }


def fit_power_law(counts: np.ndarray, *, x_min: int | None = None, min_tail: int = MIN_TAIL) -> ZipfFit | None:
    """Fit the discrete power law to the positive ``counts`` (one per type; order ignored).

    With ``x_min`` None it is chosen by the KS method among the ``MAX_CANDIDATES`` smallest
    distinct counts that leave at least ``min_tail`` types at or above them; None when no
    candidate does (or the given ``x_min`` leaves fewer than ``min_tail``)."""
    x = np.asarray(counts, dtype=np.float64)  # float: a heavy tail may pass the int64 range
    x = x[x > 0]
    values, weights = np.unique(x, return_counts=True)
    # types and sum of ln x at or above each distinct value (suffix sums)
    n_at = np.cumsum(weights[::-1])[::-1]
    log_at = np.cumsum((weights * np.log(values))[::-1])[::-1]
    tokens_at = np.cumsum((weights * values)[::-1])[::-1]
    if x_min is None:
        pick = np.flatnonzero(n_at >= min_tail)[:MAX_CANDIDATES]
    else:
        pick = np.flatnonzero(values >= x_min)[:1]  # the tail starts at the first count >= x_min
        pick = pick[n_at[pick] >= min_tail]
    if len(pick) == 0:
        return None
    x_mins = values[pick] if x_min is None else np.array([float(x_min)])
    alphas = _fit_alphas(x_mins, n_at[pick].astype(np.float64), log_at[pick])
    dists = [
        ks_distance(values[i:], weights[i:], float(a), int(m)) for i, a, m in zip(pick, alphas, x_mins, strict=True)
    ]
    best = int(np.argmin(dists))
    i = int(pick[best])
    return ZipfFit(
        alpha=float(alphas[best]),
        x_min=int(x_mins[best]),
        types=int(n_at[i]),
        tokens=int(tokens_at[i]),
        ks_distance=float(dists[best]),
        x_min_chosen=x_min is None,
    )
