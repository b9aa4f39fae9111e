"""Capacity planning for a fleet: what N nodes of n keys at target p cost and save.

Per node: the formula's m (shardsieve/sizing.py) and the ladder step actually allocated
(shardsieve/geometry.py). Fleet: the coordinator's memory (one replica per node) and the probes
a lookup is expected to cost when every node's rate is the target p (shardsieve/fanout.py).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

from shardsieve.fanout import avoided_fanout, expected_probes_hit, expected_probes_miss, uniform_rates
from shardsieve.geometry import MAX_HASHES, GeometryError, ladder_step
from shardsieve.sizing import check_fpr, check_count, false_positive_rate, optimal_bits, optimal_hashes


@dataclass
class Plan:
    """What a fleet of `nodes` nodes, each holding `keys` keys at target `fpr`, costs and buys.

    Filter figures are per node (each node's filter is sized for `keys` keys). Probe figures
    use the target rate p (shardsieve/fanout.py): a key that exists costs
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
    check_count(keys)
    check_fpr(fpr)
    check_count(nodes, "nodes")
    formula_bits = optimal_bits(keys, fpr)
    hashes = min(optimal_hashes(formula_bits, keys), MAX_HASHES)
    try:
        ladder_bits = ladder_step(formula_bits)
    except GeometryError:
        raise ValueError(f"{keys} keys at fpr {fpr:g} need {formula_bits:,} bits per node filter, above the "
                         "2^40-bit limit; spread the keys over more nodes or allow a higher fpr") from None
    filter_bytes = (ladder_bits + 7) // 8
    rates = uniform_rates(nodes, fpr)
    probes_hit = expected_probes_hit(rates, owner="0")
    probes_miss = expected_probes_miss(rates)
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
        avoided_fanout_hit=avoided_fanout(probes=probes_hit, lookups=1, nodes=nodes),
        predicted_fpr_at_ladder=false_positive_rate(ladder_bits, hashes, keys),
        formula_filter_bytes=(formula_bits + 7) // 8,
        ladder_bits_per_key=ladder_bits / keys,
        avoided_fanout_miss=avoided_fanout(probes=probes_miss, lookups=1, nodes=nodes),
    )
