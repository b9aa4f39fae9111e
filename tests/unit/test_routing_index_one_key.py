"""A one-key lookup takes its own path through the routing index (coordinator/routing_index.py,
`_lookup_one`); it must answer exactly what the batch path answers, and what each node's
BloomFilter answers (the reference: the filter's own membership test, shardsieve/bloom.py)."""

from __future__ import annotations

import numpy as np
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.coordinator.routing_index import RoutingIndex
from shardsieve.geometry import geometry_for
from shardsieve.hashing import positions


@pytest.mark.parametrize("nodes", [1, 7, 9, 16, 23])
def test_one_key_lookup_equals_the_batch_lookup_and_the_filters(nodes: int) -> None:
    geometry = geometry_for(500, 0.05)
    index = RoutingIndex(1)
    filters = {}
    rng = np.random.default_rng(nodes)
    for i in range(nodes):
        bloom = BloomFilter(geometry)
        for j in rng.integers(0, 3000, size=400):
            bloom.add(f"k{j}".encode())
        filters[f"n{i:02d}"] = bloom
        index.install(f"n{i:02d}", geometry, bloom.to_bytes())
    index.remove("n00")          # a freed slot: the live mask must hide it
    del filters["n00"]
    keys = [f"k{j}".encode() for j in range(3000)]
    batch = index.locate(keys, positions)
    for i, key in enumerate(keys[:600]):
        one = index.locate([key], positions)
        assert one.for_key(0) == batch.for_key(i)
        assert sorted(one.for_key(0)) == sorted(n for n, b in filters.items() if b.contains(key))
