"""Our filters against published false-positive tables and estimators."""

from __future__ import annotations

import math
from statistics import NormalDist

import numpy as np
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.geometry import Geometry
from shardsieve.sizing import false_positive_rate

# Fan, Cao, Almeida & Broder, "Summary Cache: A Scalable Wide-Area Web Cache Sharing
# Protocol", IEEE/ACM Transactions on Networking 8(3), 2000: table of false-positive
# probabilities by bits per entry m/n (rows) and hash count k (columns). The two entries
# m/n=8,k=6 -> 0.0216 and m/n=10,k=7 -> 0.00819 were given to the project as quoted from that
# table; the others are recalled from memory of the same table. Entries are kept as the printed
# strings because the table's precision varies (0.092 but 0.0804).
SUMMARY_CACHE_TABLE: dict[int, list[str]] = {
    2: ['0.393', '0.400'],
    3: ['0.283', '0.237', '0.253'],
    4: ['0.221', '0.155', '0.147', '0.160'],
    5: ['0.181', '0.109', '0.092', '0.092', '0.101'],
    6: ['0.154', '0.0804', '0.0609', '0.0561', '0.0578', '0.0638'],
    7: ['0.133', '0.0618', '0.0423', '0.0359', '0.0347', '0.0364'],
    8: ['0.118', '0.0489', '0.0306', '0.024', '0.0217', '0.0216', '0.0229'],
    9: ['0.105', '0.0397', '0.0228', '0.0166', '0.0141', '0.0133', '0.0135', '0.0145'],
    10: ['0.0952', '0.0329', '0.0174', '0.0118', '0.00943', '0.00844', '0.00819', '0.00846'],
}


def _printed_half_unit(printed: str) -> float:
    """Half a unit in the last printed decimal place of a table entry."""
    decimals = len(printed.split(".")[1])
    return 0.5 * 10.0 ** -decimals


@pytest.mark.parametrize("ratio", sorted(SUMMARY_CACHE_TABLE))
def test_formula_reproduces_summary_cache_table(ratio: int) -> None:
    # Fan et al. (2000) table, every entry of row m/n = ratio, to its printed precision.
    n = 1_000_000
    for k, printed in enumerate(SUMMARY_CACHE_TABLE[ratio], start=1):
        ours = false_positive_rate(ratio * n, k, n)
        assert abs(ours - float(printed)) <= _printed_half_unit(printed) + 1e-12, (ratio, k, ours, printed)


def test_the_two_quoted_summary_cache_entries() -> None:
    # Fan et al. (2000): m/n = 8, k = 6 -> 0.0216 ; m/n = 10, k = 7 -> 0.00819
    assert round(false_positive_rate(8_000_000, 6, 1_000_000), 4) == 0.0216
    assert round(false_positive_rate(10_000_000, 7, 1_000_000), 5) == 0.00819


def wilson_interval(successes: int, trials: int, confidence: float) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson, JASA 22, 1927)."""
    z = NormalDist().inv_cdf(0.5 + confidence / 2)
    phat = successes / trials
    denom = 1 + z * z / trials
    centre = (phat + z * z / (2 * trials)) / denom
    half = z * math.sqrt(phat * (1 - phat) / trials + z * z / (4 * trials * trials)) / denom
    return centre - half, centre + half


@pytest.mark.parametrize(("bits", "keys", "hashes"), [
    (1_000_000, 100_000, 7),     # m/n = 10, k = 7: Fan et al. 0.00819 (odd m: limb range reduction)
    (1 << 20, 131_072, 6),       # m/n = 8, k = 6: Fan et al. 0.0216 (ladder m: shift range reduction)
])
def test_measured_fpr_within_999_wilson_interval_of_formula(bits: int, keys: int, hashes: int) -> None:
    # 10^6 absent keys; the 99.9% Wilson score interval (Wilson 1927) of the measured rate
    # must contain the formula rate (1 - e^(-kn/m))^k (Bloom 1970; Fan et al. 2000).
    g = Geometry(bits, hashes, seed=2024)
    bf = BloomFilter(g)
    bf.add_batch([b"quay-manifest:%08d" % i for i in range(keys)])
    trials = 1_000_000
    hits = int(np.count_nonzero(bf.contains_batch([b"absent-crate:%08d" % i for i in range(trials)])))
    low, high = wilson_interval(hits, trials, 0.999)
    formula = false_positive_rate(bits, hashes, keys)
    assert low <= formula <= high, (hits / trials, formula, (low, high))
    # and the filter's own prediction fill^k agrees with the formula closely (common practice)
    assert bf.predicted_fpr() == pytest.approx(formula, rel=0.02)


def test_swamidass_baldi_cardinality_within_one_percent_at_half_fill() -> None:
    # Swamidass & Baldi, "Mathematical correction for fingerprint similarity measures to
    # improve chemical retrieval", J. Chem. Inf. Model. 47(3), 2007: n = -(m/k) ln(1 - X/m).
    n, k = 1_000_000, 7
    m = round(k * n / math.log(2))          # half fill expected: 1 - e^(-kn/m) = 1/2
    g = Geometry(m, k, seed=5)
    bf = BloomFilter(g)
    bf.add_batch([b"ledger-line:%09d" % i for i in range(n)])
    assert 0.49 < bf.fill() < 0.51
    assert abs(bf.estimated_cardinality() - n) / n < 0.01
