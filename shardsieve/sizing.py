"""Bloom filter formulas: the one home of every published formula the project computes.

Sizing (Bloom 1970; Broder & Mitzenmacher, "Network Applications of Bloom Filters: A Survey",
Internet Mathematics 1(4), 2004):
  m = ceil(-n ln p / (ln 2)^2)          least bits for n keys at false-positive rate p
  k = max(1, round((m / n) ln 2))       hashes minimising the rate for that m and n
  p = (1 - e^(-k n / m))^k              predicted rate of m bits, k hashes, n keys
From a filter's contents:
  p ~ fill^k                            predicted rate from the fraction of set bits (same survey)
  E[fill] = 1 - (1 - 1/m)^(k n)         expected fill after n distinct keys (same survey, sec. 2.1)
  n ~ -(m/k) ln(1 - X/m)                keys estimated from X set bits (Swamidass & Baldi, 2007)
"""

from __future__ import annotations

import math

LN2 = math.log(2.0)


def check_count(keys: int, name: str = "keys") -> None:
    if isinstance(keys, bool) or not isinstance(keys, int):
        raise ValueError(f"{name} must be a whole number, got {keys!r}")
    if keys < 1:
        raise ValueError(f"{name} must be at least 1, got {keys}")


def check_fpr(fpr: float) -> None:
    if isinstance(fpr, bool) or not isinstance(fpr, (int, float)) or math.isnan(fpr):
        raise ValueError(f"fpr must be a number strictly between 0 and 1, got {fpr!r}")
    if not 0.0 < fpr < 1.0:
        raise ValueError(f"fpr must be strictly between 0 and 1 (exclusive), got {fpr}")


def _round_half_up(x: float) -> int:
    return int(math.floor(x + 0.5))


def optimal_bits(keys: int, fpr: float) -> int:
    """Least m for `keys` keys at false-positive rate `fpr`: ceil(-n ln p / (ln 2)^2)."""
    check_count(keys)
    check_fpr(fpr)
    return max(1, math.ceil(-keys * math.log(fpr) / (LN2 * LN2)))


def optimal_hashes(bits: int, keys: int) -> int:
    """Best k for m bits and n keys: max(1, round((m/n) ln 2)), halves rounded up."""
    check_count(keys)
    check_count(bits, "bits")
    return max(1, _round_half_up(bits / keys * LN2))


def false_positive_rate(bits: int, hashes: int, keys: int) -> float:
    """Predicted false-positive rate (1 - e^(-kn/m))^k; 0 keys give 0."""
    check_count(bits, "bits")
    check_count(hashes, "hashes")
    if isinstance(keys, bool) or not isinstance(keys, int) or keys < 0:
        raise ValueError(f"keys must be a whole number >= 0, got {keys!r}")
    if keys == 0:
        return 0.0
    return float((-math.expm1(-hashes * keys / bits)) ** hashes)


def capacity_for(bits: int, hashes: int, fpr: float) -> int:
    """Most keys a filter of m bits and k hashes takes while its predicted rate stays <= fpr."""
    check_count(bits, "bits")
    check_count(hashes, "hashes")
    check_fpr(fpr)
    # (1 - e^(-kn/m))^k <= p  <=>  n <= -(m/k) ln(1 - p^(1/k))
    n = int(math.floor(-(bits / hashes) * math.log1p(-(fpr ** (1.0 / hashes)))))
    n = max(n, 0)
    while n > 0 and false_positive_rate(bits, hashes, n) > fpr:  # float guard
        n -= 1
    while false_positive_rate(bits, hashes, n + 1) <= fpr:
        n += 1
    return n


def fill_fpr(fill: float, hashes: int) -> float:
    """fill^k: the chance that all k positions of an absent key are already set."""
    if not 0.0 <= fill <= 1.0:
        raise ValueError(f"fill must be within [0, 1], got {fill}")
    return float(fill ** hashes)


def expected_fill(bits: int, hashes: int, key_count: int) -> float:
    """Expected fraction of set bits after key_count distinct keys: 1 - (1 - 1/m)^(k n)."""
    if bits <= 0:
        return 0.0
    return -math.expm1(hashes * key_count * math.log1p(-1.0 / bits))


def estimated_keys(bits: int, hashes: int, set_bits: int) -> float:
    """Keys in a filter with set_bits of its m bits set: -(m/k) ln(1 - X/m); inf when full."""
    if set_bits >= bits:
        return math.inf
    return -(bits / hashes) * math.log1p(-set_bits / bits)
