"""Bloom filter sizing from the published formulas, and the fleet-level plan.

Formulas (Bloom 1970; Broder & Mitzenmacher, "Network Applications of Bloom Filters", 2004):
  m = ceil(-n ln p / (ln 2)^2)          least bits for n keys at false-positive rate p
  k = max(1, round((m / n) ln 2))       hashes minimising the rate for that m and n
  p = (1 - e^(-k n / m))^k              predicted rate of m bits, k hashes, n keys
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

LN2 = math.log(2.0)


def _check_keys(keys: int, name: str = "keys") -> None:
    if isinstance(keys, bool) or not isinstance(keys, int):
        raise ValueError(f"{name} must be a whole number, got {keys!r}")
    if keys < 1:
        raise ValueError(f"{name} must be at least 1, got {keys}")


def _check_fpr(fpr: float) -> None:
    if isinstance(fpr, bool) or not isinstance(fpr, (int, float)) or math.isnan(fpr):
        raise ValueError(f"fpr must be a number strictly between 0 and 1, got {fpr!r}")
    if not 0.0 < fpr < 1.0:
        raise ValueError(f"fpr must be strictly between 0 and 1 (exclusive), got {fpr}")


def _round_half_up(x: float) -> int:
    return int(math.floor(x + 0.5))


def optimal_bits(keys: int, fpr: float) -> int:
    """Least m for `keys` keys at false-positive rate `fpr`: ceil(-n ln p / (ln 2)^2)."""
    _check_keys(keys)
    _check_fpr(fpr)
    return max(1, math.ceil(-keys * math.log(fpr) / (LN2 * LN2)))


def optimal_hashes(bits: int, keys: int) -> int:
    """Best k for m bits and n keys: max(1, round((m/n) ln 2)), halves rounded up."""
    _check_keys(keys)
    _check_keys(bits, "bits")
    return max(1, _round_half_up(bits / keys * LN2))


def false_positive_rate(bits: int, hashes: int, keys: int) -> float:
    """Predicted false-positive rate (1 - e^(-kn/m))^k; 0 keys give 0."""
    _check_keys(bits, "bits")
    _check_keys(hashes, "hashes")
    if isinstance(keys, bool) or not isinstance(keys, int) or keys < 0:
        raise ValueError(f"keys must be a whole number >= 0, got {keys!r}")
    if keys == 0:
        return 0.0
    return float((-math.expm1(-hashes * keys / bits)) ** hashes)


def capacity_for(bits: int, hashes: int, fpr: float) -> int:
    """Most keys a filter of m bits and k hashes takes while its predicted rate stays <= fpr."""
    _check_keys(bits, "bits")
    _check_keys(hashes, "hashes")
    _check_fpr(fpr)
    # (1 - e^(-kn/m))^k <= p  <=>  n <= -(m/k) ln(1 - p^(1/k))
    n = int(math.floor(-(bits / hashes) * math.log1p(-(fpr ** (1.0 / hashes)))))
    n = max(n, 0)
    while n > 0 and false_positive_rate(bits, hashes, n) > fpr:  # float guard
        n -= 1
    while false_positive_rate(bits, hashes, n + 1) <= fpr:
        n += 1
    return n


@dataclass
class Plan:
    """What a fleet of `nodes` nodes, each holding `keys` keys at target `fpr`, costs and buys.

    Filter figures are per node (each node's filter is sized for `keys` keys). Probe figures
    use the target rate p as the issue's formulas state: a key that exists costs
    1 + (K-1)p probes, one that does not costs K p; avoided fan-out is 1 - probes/K.
    """

    keys: int
    fpr: float
    nodes: int
    bits_per_key: float            # formula m / n
    hashes: int
    formula_bits: int              # m from the formula
    ladder_bits: int               # the ladder step a node actually allocates
    filter_bytes_per_node: int     # bytes of the ladder-sized filter
    coordinator_bytes: int         # one replica per node
    expected_probes_hit: float
    expected_probes_miss: float
    avoided_fanout_hit: float
    predicted_fpr_at_ladder: float
    formula_filter_bytes: int = 0
    ladder_bits_per_key: float = 0.0
    avoided_fanout_miss: float = 0.0

    def to_json_dict(self) -> dict[str, Any]:
        return asdict(self)


def plan(keys: int, fpr: float, nodes: int = 1) -> Plan:
    """Size one node's filter and the fleet's costs; ValueError with a one-line reason on bad input."""
    from shardsieve.geometry import MAX_HASHES, GeometryError, ladder_step

    _check_keys(keys)
    _check_fpr(fpr)
    _check_keys(nodes, "nodes")
    formula_bits = optimal_bits(keys, fpr)
    hashes = min(optimal_hashes(formula_bits, keys), MAX_HASHES)
    try:
        ladder_bits = ladder_step(formula_bits)
    except GeometryError:
        raise ValueError(f"{keys} keys at fpr {fpr:g} need {formula_bits:,} bits per node filter, above the "
                         "2^40-bit limit; spread the keys over more nodes or allow a higher fpr") from None
    filter_bytes = (ladder_bits + 7) // 8
    probes_hit = 1.0 + (nodes - 1) * fpr
    probes_miss = nodes * fpr
    return Plan(
        keys=keys,
        fpr=fpr,
        nodes=nodes,
        bits_per_key=formula_bits / keys,
        hashes=hashes,
        formula_bits=formula_bits,
        ladder_bits=ladder_bits,
        filter_bytes_per_node=filter_bytes,
        coordinator_bytes=filter_bytes * nodes,
        expected_probes_hit=probes_hit,
        expected_probes_miss=probes_miss,
        avoided_fanout_hit=1.0 - probes_hit / nodes,
        predicted_fpr_at_ladder=false_positive_rate(ladder_bits, hashes, keys),
        formula_filter_bytes=(formula_bits + 7) // 8,
        ladder_bits_per_key=ladder_bits / keys,
        avoided_fanout_miss=1.0 - probes_miss / nodes,
    )
