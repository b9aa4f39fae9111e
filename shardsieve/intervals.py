"""Binomial intervals: the one home of the confidence intervals the coordinator and the load
tester compute (observed false-positive rates, measured probe counts against the prediction).

- `wilson_interval`: the score interval for a proportion (E. B. Wilson, "Probable inference, the
  law of succession, and statistical inference", JASA 22, 1927). The coordinator's accounting and
  saturation policy use 95 %; the load tester's report 99.9 %.
- `binomial_acceptance_interval`: the equal-tailed acceptance region of the exact binomial test,
  the same tails Clopper & Pearson (Biometrika 26, 1934) invert for their interval. Used "around
  the prediction": if the model is right, the count of wasted probes falls inside with at least
  the stated confidence.

Wasted probes over nodes with different false-positive rates are a sum of Bernoulli trials with
unequal p (Poisson-binomial). Its variance is at most that of a binomial with the same mean
(Hoeffding, "On the distribution of the number of successes in independent trials", Ann. Math.
Statist. 27, 1956), so a binomial interval with the mean rate is conservative.
"""

from __future__ import annotations

import functools
import math
from statistics import NormalDist


@functools.lru_cache(maxsize=16)
def z_for(confidence: float) -> float:
    """Two-sided standard-normal quantile, e.g. 0.999 -> 3.2905."""
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be strictly between 0 and 1, got {confidence}")
    return NormalDist().inv_cdf(0.5 + confidence / 2.0)


def wilson_interval(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for successes/trials; (0, 1) when there are no trials."""
    if trials < 0 or successes < 0 or successes > trials:
        raise ValueError(f"need 0 <= successes <= trials, got {successes}/{trials}")
    if trials == 0:
        return (0.0, 1.0)
    z = z_for(confidence)
    n = float(trials)
    phat = successes / n
    denom = 1.0 + z * z / n
    centre = (phat + z * z / (2 * n)) / denom
    half = z * math.sqrt(phat * (1 - phat) / n + z * z / (4 * n * n)) / denom
    # at 0 or n successes the bound is exactly 0 or 1 (the closed form); do not let rounding say otherwise
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == trials else min(1.0, centre + half)
    return (low, high)


def _log_pmf(k: int, n: int, p: float) -> float:
    return (math.lgamma(n + 1) - math.lgamma(k + 1) - math.lgamma(n - k + 1)
            + k * math.log(p) + (n - k) * math.log1p(-p))


def binomial_acceptance_interval(trials: int, p: float, confidence: float = 0.999) -> tuple[int, int]:
    """Smallest lo and largest-needed hi with P(X < lo) <= a/2 and P(X > hi) <= a/2, X ~ Bin(n, p).

    Sums the exact pmf outward from the mode (log-space, so n in the millions is fine).
    """
    if trials < 0:
        raise ValueError(f"trials must be >= 0, got {trials}")
    if not 0.0 <= p <= 1.0 or math.isnan(p):
        raise ValueError(f"p must be within 0..1, got {p}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be strictly between 0 and 1, got {confidence}")
    if trials == 0 or p == 0.0:
        return (0, 0)
    if p == 1.0:
        return (trials, trials)
    alpha = (1.0 - confidence) / 2.0
    n = trials
    mode = min(n, int(math.floor((n + 1) * p)))
    # The pmf beyond 12 standard deviations (+10) of the mode is negligible for any alpha used here.
    sd = math.sqrt(n * p * (1 - p))
    left = max(0, int(mode - 12 * sd - 10))
    right = min(n, int(mode + 12 * sd + 10))
    probs = [math.exp(_log_pmf(k, n, p)) for k in range(left, right + 1)]
    # P(X < lo) <= alpha: largest lo with that property.
    acc = 0.0
    lo = left
    for i, pr in enumerate(probs):
        if acc + pr > alpha:
            lo = left + i
            break
        acc += pr
    acc = 0.0
    hi = right
    for i in range(len(probs) - 1, -1, -1):
        if acc + probs[i] > alpha:
            hi = left + i
            break
        acc += probs[i]
    return (lo, hi)
