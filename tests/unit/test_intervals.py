"""Binomial intervals used by the load-test report."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from shardsieve.intervals import binomial_acceptance_interval, wilson_interval, z_for


def exact_tails(n: int, p: Fraction) -> list[Fraction]:
    """Binomial pmf by its definition C(n,k) p^k (1-p)^(n-k), in exact rational arithmetic."""
    return [math.comb(n, k) * p**k * (1 - p) ** (n - k) for k in range(n + 1)]


def test_z_for_999_matches_normal_table() -> None:
    # Two-sided 99.9% standard-normal quantile 3.2905 (standard normal tables, e.g. Abramowitz &
    # Stegun 1964 Table 26.5; value recalled from memory to 4 decimals).
    assert z_for(0.999) == pytest.approx(3.2905, abs=1e-4)
    # 95%: 1.95996 (same tables, recalled from memory).
    assert z_for(0.95) == pytest.approx(1.95996, abs=1e-5)


@pytest.mark.parametrize("successes,trials,low,high", [
    # Newcombe, "Two-sided confidence intervals for the single proportion", Stat. Med. 17 (1998),
    # Table II, method 3 (Wilson score without continuity correction); values recalled from memory.
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0, 0.1611),
    (1, 29, 0.0061, 0.1718),
])
def test_wilson_matches_published_examples(successes: int, trials: int, low: float, high: float) -> None:
    lo, hi = wilson_interval(successes, trials, 0.95)
    assert lo == pytest.approx(low, abs=1e-4)
    assert hi == pytest.approx(high, abs=1e-4)


@pytest.mark.parametrize("x,n", [(3, 50), (40, 1000), (999, 1000)])
def test_wilson_bounds_solve_the_score_equation(x: int, n: int) -> None:
    # Wilson (1927): the bounds are the p with |x/n - p| = z sqrt(p (1-p) / n).
    z = z_for(0.999)
    for p in wilson_interval(x, n, 0.999):
        assert abs(x / n - p) == pytest.approx(z * math.sqrt(p * (1 - p) / n), rel=1e-9)


@pytest.mark.parametrize("n,p,conf", [(10, "1/2", 0.95), (40, "1/10", 0.999), (200, "1/50", 0.99),
                                      (25, "9/10", 0.9)])
def test_acceptance_interval_matches_exact_enumeration(n: int, p: str, conf: float) -> None:
    # Reference: the binomial pmf by definition in exact fractions; lo is the largest value with
    # P(X < lo) <= alpha/2 and hi the smallest with P(X > hi) <= alpha/2 (equal-tailed region of
    # the exact test, Clopper & Pearson 1934).
    pmf = exact_tails(n, Fraction(p))
    alpha = Fraction(1) - Fraction(conf).limit_denominator(10_000)
    half = alpha / 2
    lo = max(k for k in range(n + 1) if sum(pmf[:k]) <= half)
    hi = min(k for k in range(n + 1) if sum(pmf[k + 1:]) <= half)
    assert binomial_acceptance_interval(n, float(Fraction(p)), conf) == (lo, hi)


def test_acceptance_interval_covers_simulated_counts() -> None:
    # Coverage of a 99% region: draws from numpy's binomial generator (reference sampler) fall
    # outside at most ~1% of the time; 4000 draws, allow up to 2% (binomial tail, common practice).
    rng = np.random.default_rng(7)
    n, p = 5000, 0.013
    lo, hi = binomial_acceptance_interval(n, p, 0.99)
    draws = rng.binomial(n, p, size=4000)
    outside = np.mean((draws < lo) | (draws > hi))
    assert outside <= 0.02
    assert lo < n * p < hi


def test_bad_inputs_are_refused() -> None:
    with pytest.raises(ValueError, match="successes <= trials"):
        wilson_interval(5, 3)
    with pytest.raises(ValueError, match="p must be"):
        binomial_acceptance_interval(10, 1.5)
    with pytest.raises(ValueError, match="confidence"):
        z_for(1.0)
    assert binomial_acceptance_interval(0, 0.3) == (0, 0)
    assert wilson_interval(0, 0) == (0.0, 1.0)
