"""The Zipf fit (seqpipe.report.zipf): the discrete power-law maximum-likelihood estimator of
Clauset, Shalizi & Newman (2009, SIAM Review 51(4)), its Hurwitz zeta, its KS distance, and
where the report skips it."""

from __future__ import annotations

import math

import numpy as np
import pytest
from memory_dataset import dataset_from_documents

from seqpipe.report import corpus_report
from seqpipe.report.zipf import MIN_TAIL, fit_power_law, hurwitz_zeta, ks_distance


def draw_power_law(alpha: float, n: int, seed: int) -> np.ndarray:
    """n draws from P(x) = x**-alpha / zeta(alpha), x = 1, 2, ..., by Devroye's rejection method
    (Devroye 1986, "Non-Uniform Random Variate Generation", section X.6.1), in floats so the
    heavy tail of alpha near 1 is not cut at the int64 range (numpy's Generator.zipf redraws
    values past it, which biases alpha = 1.1 upwards)."""
    rng = np.random.default_rng(seed)
    b = 2.0 ** (alpha - 1)
    out: list[np.ndarray] = []
    got = 0
    while got < n:
        u = 1.0 - rng.random(2 * n)
        v = rng.random(2 * n)
        x = np.floor(u ** (-1.0 / (alpha - 1)))
        t_minus_1 = np.expm1((alpha - 1) * np.log1p(1.0 / x))  # (1 + 1/x)**(alpha-1) - 1, exact for large x
        keep = x[v * x * t_minus_1 / (b - 1) <= (1 + t_minus_1) / b]
        out.append(keep)
        got += len(keep)
    return np.concatenate(out)[:n]


@pytest.mark.parametrize(
    ("s", "q", "expected"),
    [
        (2.0, 1.0, math.pi**2 / 6),  # Basel problem
        (4.0, 1.0, math.pi**4 / 90),  # Euler
        (3.0, 2.0, 1.2020569031595942 - 1.0),  # Apery's constant minus its first term
        (2.0, 0.5 + 1.0, math.pi**2 / 2 - 4.0),  # zeta(2, 1/2) = (2**2 - 1) zeta(2), minus its first term
    ],
)
def test_hurwitz_zeta_known_values(s: float, q: float, expected: float) -> None:
    """The Hurwitz zeta sum matches closed forms (common practice, standard identities)."""
    assert float(hurwitz_zeta(s, q)) == pytest.approx(expected, rel=1e-12)


def test_hurwitz_zeta_steps_by_one_term() -> None:
    """zeta(s, q) - zeta(s, q + 1) = q**-s for s near 1 and large q, where the tail dominates."""
    s = np.array([1.05, 1.1, 1.5, 2.5])
    q = np.array([1.0, 7.0, 1e3, 1e4])  # larger q: the difference cancels to float noise
    np.testing.assert_allclose(hurwitz_zeta(s, q) - hurwitz_zeta(s, q + 1), q**-s, rtol=1e-7)


@pytest.mark.parametrize("alpha", [1.1, 1.5, 2.0])
def test_estimate_lies_within_the_papers_standard_error(alpha: float) -> None:
    """Clauset et al. (2009), eq. 3.2: the estimate's standard error is (alpha-1)/sqrt(n). On 20,000
    seeded draws from a known discrete power law the estimate lies within 3 standard errors of the
    true exponent, with x_min fixed at 1 and with x_min chosen by the KS method."""
    x = draw_power_law(alpha, 20_000, seed=0)
    fixed = fit_power_law(x, x_min=1)
    assert fixed is not None and fixed.types == 20_000 and fixed.x_min_chosen is False
    assert abs(fixed.alpha - alpha) <= 3 * (alpha - 1) / math.sqrt(fixed.types)
    chosen = fit_power_law(x)
    assert chosen is not None and chosen.x_min_chosen
    assert abs(chosen.alpha - alpha) <= 3 * chosen.standard_error
    assert chosen.ks_distance < 0.02


def test_ks_method_finds_the_start_of_the_power_law() -> None:
    """Counts below 20 drawn from a different (uniform) law are left out: the chosen x_min is
    near where the power law starts, and its alpha is the true one within 3 standard errors."""
    tail = draw_power_law(1.8, 20_000, seed=1)
    tail = tail[tail >= 20]
    head = np.random.default_rng(2).integers(1, 20, size=len(tail))
    fit = fit_power_law(np.concatenate([tail, head]))
    assert fit is not None
    assert 15 <= fit.x_min <= 40
    assert abs(fit.alpha - 1.8) <= 3 * fit.standard_error


def test_ks_distance_of_an_exact_law_is_small_and_of_a_wrong_one_large() -> None:
    """The KS distance of draws against their own law is near 0 and against a far exponent is not."""
    x = draw_power_law(2.0, 20_000, seed=3)
    values, weights = np.unique(x, return_counts=True)
    assert ks_distance(values, weights, 2.0, 1) < 0.02
    assert ks_distance(values, weights, 3.0, 1) > 0.1


def test_rank_line_passes_through_the_tails_smallest_count() -> None:
    """The fitted rank-frequency line gives rank n (the number of types fitted) the count x_min,
    and falls with exponent 1/(alpha-1)."""
    fit = fit_power_law(draw_power_law(2.0, 5_000, seed=4), x_min=1)
    assert fit is not None
    line = fit.rank_line(np.array([1.0, 10.0, float(fit.types)]))
    assert line[2] == pytest.approx(fit.x_min)
    assert math.log(line[0] / line[1]) / math.log(10) == pytest.approx(fit.rank_exponent)


def test_too_few_types_give_no_fit() -> None:
    """Fewer than MIN_TAIL types at or above x_min give no fit (None), whatever x_min."""
    few = np.arange(1, MIN_TAIL)
    assert fit_power_law(few) is None
    assert fit_power_law(np.arange(1, 500), x_min=480) is None
    assert fit_power_law(np.zeros(10)) is None


def test_report_skips_the_fit_for_a_character_alphabet_and_says_why() -> None:
    """A vocabulary of single characters gets no Zipf fit, with the reason in the report."""
    rng = np.random.default_rng(5)
    letters = list("abcdefghijklmnopqrstuvwxyz")
    docs = [list(rng.choice(letters, size=30)) for _ in range(200)]
    report = corpus_report(dataset_from_documents({"train": docs}), progress=False)
    zipf = report["splits"]["train"]["zipf"]
    assert set(zipf) == {"skipped"} and "single character" in zipf["skipped"]


def test_report_fits_a_word_vocabulary() -> None:
    """Words drawn with power-law frequencies get a fitted alpha near the drawn one, with its
    KS distance, x_min and the types it covers."""
    ids = draw_power_law(2.0, 4_000, seed=6).astype(np.int64)
    # type k occurs ids[k] times: a corpus whose type counts follow the law
    words = np.repeat(np.array([f"w{k}" for k in range(len(ids))]), np.minimum(ids, 2_000))
    np.random.default_rng(7).shuffle(words)
    docs = [list(chunk) for chunk in np.array_split(words, 100)]
    report = corpus_report(dataset_from_documents({"train": docs}), progress=False)
    zipf = report["splits"]["train"]["zipf"]
    assert {"alpha", "standard_error", "rank_exponent", "x_min", "types", "ks_distance"} <= set(zipf)
    assert abs(zipf["alpha"] - 2.0) <= 0.15
