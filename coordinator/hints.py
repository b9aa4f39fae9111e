"""Read-your-writes hints: list a node for a key it just acknowledged until its filter change arrives.

A write through the coordinator is acknowledged by the node with the (epoch, sequence) of the
delta that will carry its filter change. Until the coordinator's replica of that node has
applied that sequence in that epoch (or moved to a later epoch through a verified snapshot),
the key's lookups list the node from this table. Pure: no clocks, no I/O; thread-safe.
"""

from __future__ import annotations

import heapq
import threading
from typing import Iterable, Sequence


class HintTable:
    def __init__(self, max_hints: int = 1_000_000) -> None:
        self._lock = threading.Lock()
        self._by_key: dict[bytes, dict[str, tuple[int, int]]] = {}
        self._by_node: dict[str, list[tuple[int, int, bytes]]] = {}  # min-heap of (epoch, sequence, key)
        self._count = 0
        self.max_hints = max_hints

    def __len__(self) -> int:
        return self._count

    def add(self, key: bytes, node_id: str, epoch: int, sequence: int,
            applied: tuple[int, int] | None = None) -> bool:
        """Hold a hint unless the replica already applied (epoch, sequence); True if one is held."""
        if applied is not None and applied >= (epoch, sequence):
            return False
        with self._lock:
            if self._count >= self.max_hints:
                raise OverflowError(f"{self._count} read-your-writes hints outstanding (limit {self.max_hints}); "
                                    "node filter changes are not arriving")
            per_key = self._by_key.setdefault(key, {})
            previous = per_key.get(node_id)
            if previous is None:
                self._count += 1
            if previous is None or previous < (epoch, sequence):
                per_key[node_id] = (epoch, sequence)
            heapq.heappush(self._by_node.setdefault(node_id, []), (epoch, sequence, key))
            return True

    def applied(self, node_id: str, epoch: int, sequence: int) -> int:
        """The replica of node_id now holds (epoch, sequence): drop the hints it covers; returns how many."""
        dropped = 0
        with self._lock:
            heap = self._by_node.get(node_id)
            while heap and (heap[0][0], heap[0][1]) <= (epoch, sequence):
                e, s, key = heapq.heappop(heap)
                per_key = self._by_key.get(key)
                if per_key is not None and per_key.get(node_id, (-1, -1)) <= (epoch, sequence):
                    del per_key[node_id]
                    self._count -= 1
                    dropped += 1
                    if not per_key:
                        del self._by_key[key]
            if heap is not None and not heap:
                del self._by_node[node_id]
        return dropped

    def drop_node(self, node_id: str) -> None:
        with self._lock:
            for _, _, key in self._by_node.pop(node_id, []):
                per_key = self._by_key.get(key)
                if per_key and per_key.pop(node_id, None) is not None:
                    self._count -= 1
                    if not per_key:
                        del self._by_key[key]

    def lookup(self, key: bytes) -> list[str]:
        with self._lock:
            per_key = self._by_key.get(key)
            return list(per_key) if per_key else []

    def lookup_many(self, keys: Sequence[bytes]) -> list[list[str]] | None:
        """Hinted nodes per key, or None when no hints are held (the common, fast case)."""
        if not self._count:
            return None
        with self._lock:
            get = self._by_key.get
            return [list(get(k, ())) for k in keys]

    def nodes(self) -> Iterable[str]:
        with self._lock:
            return list(self._by_node)
