"""The tour's invented scenario: distinct records, reproducible, placement by farm."""

from __future__ import annotations

from collections import Counter

import pytest

from shardsieve import scenario


def test_records_are_distinct_reproducible_and_in_the_invented_namespace() -> None:
    recs = scenario.records(3000, seed=4)
    keys = [r.key for r in recs]
    assert len(keys) == 3000 and len(set(keys)) == 3000
    assert all(k.startswith(b"brinewick/") for k in keys)
    assert [r.key for r in scenario.records(3000, seed=4)] == keys
    assert [r.key for r in scenario.records(3000, seed=5)] != keys
    with pytest.raises(ValueError, match=">= 0"):
        scenario.records(-1)


def test_placement_follows_the_farm_and_uses_every_node() -> None:
    nodes = [f"shed-{i}" for i in range(1, 9)]
    recs, owners = scenario.placed(scenario.records(6000, seed=1), nodes, seed=1)
    assert set(owners) == set(nodes)
    place = scenario.farm_placement(nodes, seed=1)
    # Two of every three records of a farm stay on its home node; the third overflowed to the next one.
    home = sum(1 for r, o in zip(recs, owners) if o == place[r.farm])
    assert home >= len(recs) * 2 // 3 - 1
    # Uneven on purpose: the busiest node holds clearly more than an even share (saturation to explore).
    counts = Counter(owners)
    assert max(counts.values()) > 1.2 * len(recs) / len(nodes)
    with pytest.raises(ValueError, match="no nodes"):
        scenario.farm_placement([])
