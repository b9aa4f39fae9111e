"""The coordinator's replicas of the nodes' filters: the ReplicaSink over the routing index.

CoordinatorSync writes verified filters and deltas here (install / apply / remove); lookups
read the bit-sliced index (`locate`). The index keeps each node's count of set bits with
every install and delta, so fill and predicted FPR (shardsieve/sizing.py) cost nothing at
status time.

Writes come from CoordinatorSync, under the coordinator's lock. The index serialises its own
readers and writers (coordinator/routing_index.py), so `locate` runs outside that lock.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.coordinator.routing_index import Candidates, RoutingIndex
from shardsieve.geometry import Geometry
from shardsieve.hashing import positions as hash_positions


class Replicas:
    """Replica bits per node (in a RoutingIndex) and their set-bit counts."""

    def __init__(self, index: RoutingIndex) -> None:
        self._index = index

    # -- ReplicaSink (called by CoordinatorSync) -----------------------------------------------
    def install(self, node_id: str, bloom: BloomFilter) -> None:
        """Swap in a whole verified filter for node_id (lookups see the old one or this one)."""
        self._index.install(node_id, bloom.geometry, bloom.to_bytes())

    def apply(self, node_id: str, changes: ChangeSet) -> None:
        """Apply one verified change set in place (FilterDivergedError: nothing changed)."""
        self._index.apply(node_id, changes.set_positions, changes.cleared_positions)

    def remove(self, node_id: str) -> None:
        self._index.remove(node_id)

    # -- reads ----------------------------------------------------------------------------------
    def locate(self, keys: Sequence[bytes]) -> Candidates:
        """Nodes whose replica has all k bits of each key set (CSR form: offsets, nodes)."""
        return self._index.locate(keys, hash_positions)

    def set_bits(self, node_id: str) -> int:
        """Bits set in node_id's replica (0 without one)."""
        if self._index.geometry_of(node_id) is None:
            return 0
        return self._index.popcount(node_id)

    def set_bits_of_all(self) -> dict[str, int]:
        """set_bits() of every node with a replica, read at once."""
        return self._index.popcounts()

    def nodes(self) -> list[str]:
        """Nodes with a replica in the index."""
        return self._index.nodes()

    def geometry_of(self, node_id: str) -> Geometry | None:
        return self._index.geometry_of(node_id)

    def packed(self, node_id: str) -> bytes:
        """node_id's replica in the snapshot's RAW format (m/8 bytes; the replica feed's snapshots)."""
        return self._index.packed(node_id)

    def column(self, node_id: str) -> np.ndarray:
        """node_id's replica as 0/1 per bit (a copy; tests and diagnostics)."""
        return self._index.column(node_id)

    def memory_bytes(self) -> int:
        return self._index.memory_bytes()

    @property
    def workers(self) -> int:
        """Threads one large lookup is split across."""
        return self._index.workers
