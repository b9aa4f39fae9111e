"""Fan-out figures: probes a lookup costs, what the filters save, and what the model predicts.

The one home of these formulas (docs/architecture.md#words). Each node j that a key is not on
draws a probe with its false-positive rate p_j (the Bloom filter rate, Bloom 1970); the node
that holds the key is always probed (no false negatives). So, every candidate being probed:

  existing key held by node i:  1 + sum_{j != i} p_j     (= 1 + (N-1) p when all p_j = p)
  absent key:                   sum_j p_j                (= N p)
  avoided fan-out:              1 - probes / (lookups x N)

Arguments are keyword-only: a probe count and a lookup count are both integers, and swapping
them would still type-check.
"""

from __future__ import annotations

from typing import Mapping


def avoided_fanout(*, probes: float, lookups: int, nodes: int) -> float:
    """1 - probes / (lookups x nodes): the share of a full fan-out that was not sent; 0 when
    nothing was looked up."""
    if lookups <= 0 or nodes <= 0:
        return 0.0
    return 1.0 - probes / (lookups * nodes)


def expected_probes_hit(fprs: Mapping[str, float], owner: str) -> float:
    """Expected probes for a key held by `owner`: 1 + the rates of every other node."""
    return 1.0 + sum(p for node, p in fprs.items() if node != owner)


def expected_probes_miss(fprs: Mapping[str, float]) -> float:
    """Expected probes for a key no node holds: the sum of every node's rate."""
    return float(sum(fprs.values()))


def uniform_rates(nodes: int, fpr: float) -> dict[str, float]:
    """`nodes` nodes sharing one rate (capacity planning): keys '0'..'N-1'."""
    return {str(i): fpr for i in range(nodes)}
