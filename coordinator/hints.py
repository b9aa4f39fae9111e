"""Read-your-writes hints: list a node for a key it just acknowledged until its filter change arrives.

A write through the coordinator is acknowledged by the node with the (epoch, sequence) of the
delta that will carry its filter change. Until the coordinator's replica of that node holds
the write, the key's lookups list the node from this table. A hint is dropped only when it is
certain the key is routable without it: when the replica holds the write by the rule
`holds_write` (shardsieve/sync/coordinator_side.py, the one statement of it; CoordinatorSync.covers
uses it too), which also covers a write made during a rebuild hand-over through the old epoch's
position it reports (`old`); a hand-over that is abandoned goes on under a fresh epoch above
`position`, so reaching that epoch clears the hint as well; or, as a last resort, when the hint is older than a bound (`expire`), returned to the caller to log with its
numbers (safe mode still lists a stale node).

The table subscribes to the sync events: a replica that advanced or was installed drops the
hints it covers, an unlisted node drops all of its hints.

Pure: no clocks (the caller passes `now`), no I/O. Not thread-safe: the coordinator calls it
under its one lock (docs/architecture.md#how-events-flow).
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

from shardsieve.sync.coordinator_side import (
    NodeUnlisted,
    Position,
    ReplicaAdvanced,
    ReplicaInstalled,
    SyncEvent,
    holds_write,
)


@dataclass(frozen=True)
class Hint:
    """One outstanding hint: where the write lands, and when it was taken (None: never ages out)."""

    key: bytes
    node_id: str
    position: Position
    old: Position | None = None
    added_at: float | None = None

    def covered_by(self, replica: Position) -> bool:
        """True when a replica at `replica` certainly holds the write."""
        return holds_write(replica, self.position, self.old)


class HintTable:
    """Outstanding hints, indexed by key, by node position, by old-epoch position and by age."""

    def __init__(self, max_hints: int = 1_000_000) -> None:
        self._by_key: dict[bytes, dict[str, Hint]] = {}
        # per node, lazy min-heaps (entries whose hint was replaced or dropped are skipped when popped)
        self._by_node: dict[str, list[tuple[int, int, bytes]]] = {}          # (epoch, sequence, key)
        self._by_old: dict[str, dict[int, list[tuple[int, bytes]]]] = {}    # old epoch -> (old sequence, key)
        self._by_age: list[tuple[float, str, bytes]] = []                    # (added_at, node, key)
        self._per_node: dict[str, int] = {}     # hints held per node (empty node: its heaps go)
        self._count = 0
        self.max_hints = max_hints
        self.expired_unapplied = 0   # hints dropped by age while the replica still lacked their write

    def __len__(self) -> int:
        return self._count

    def add(self, key: bytes, node_id: str, epoch: int, sequence: int,
            applied: Position | None = None, *, old: Position | None = None, now: float | None = None) -> bool:
        """Hold a hint unless the replica (at `applied`) already holds the write; True if one is held.

        `old`: the write's position in the previous epoch while a rebuild hand-over runs (WriteAck
        old_position). `now`: when the hint was taken, for `expire` (None: it never ages out).
        """
        hint = Hint(key, node_id, (epoch, sequence), old, now)
        if applied is not None and hint.covered_by(applied):
            return False
        per_key = self._by_key.get(key)
        previous = per_key.get(node_id) if per_key is not None else None
        if previous is None and self._count >= self.max_hints:
            raise OverflowError(f"{self._count} read-your-writes hints outstanding (limit {self.max_hints}); "
                                "node filter changes are not arriving")
        if per_key is None:
            per_key = self._by_key[key] = {}
        if previous is None:
            self._count += 1
            self._per_node[node_id] = self._per_node.get(node_id, 0) + 1
        elif previous.position > hint.position:
            return True     # an older write acknowledged late: the held (later) hint covers it
        per_key[node_id] = hint
        heapq.heappush(self._by_node.setdefault(node_id, []), (epoch, sequence, key))
        if old is not None:
            heapq.heappush(self._by_old.setdefault(node_id, {}).setdefault(old[0], []), (old[1], key))
        if now is not None:
            heapq.heappush(self._by_age, (now, node_id, key))
        return True

    def _drop(self, key: bytes, node_id: str) -> Hint | None:
        """Remove the held hint of (key, node)."""
        per_key = self._by_key.get(key)
        if per_key is None:
            return None
        hint = per_key.pop(node_id, None)
        if hint is not None:
            self._count -= 1
            if not per_key:
                del self._by_key[key]
            left = self._per_node[node_id] - 1
            if left:
                self._per_node[node_id] = left
            else:   # nothing held: whatever is left in its heaps is stale
                del self._per_node[node_id]
                self._by_node.pop(node_id, None)
                self._by_old.pop(node_id, None)
        return hint

    def _held(self, key: bytes, node_id: str) -> Hint | None:
        per_key = self._by_key.get(key)
        return per_key.get(node_id) if per_key is not None else None

    def applied(self, node_id: str, epoch: int, sequence: int) -> int:
        """The replica of node_id now holds (epoch, sequence): drop the hints it covers; returns how many."""
        replica = (epoch, sequence)
        dropped = 0
        heap = self._by_node.get(node_id, [])
        while heap and (heap[0][0], heap[0][1]) <= replica:
            _, _, key = heapq.heappop(heap)
            hint = self._held(key, node_id)
            if hint is not None and hint.covered_by(replica):
                self._drop(key, node_id)
                dropped += 1
        olds = self._by_old.get(node_id, {})
        for old_epoch in [e for e in olds if e <= epoch]:
            old_heap = olds[old_epoch]
            # an old epoch the replica has left can never cover through `old` again: discard
            # its entries (those hints stay, held by their main position or their age)
            while old_heap and (old_epoch < epoch or old_heap[0][0] <= sequence):
                _, key = heapq.heappop(old_heap)
                hint = self._held(key, node_id)
                if hint is not None and hint.covered_by(replica):
                    self._drop(key, node_id)
                    dropped += 1
            if not old_heap:
                olds.pop(old_epoch, None)
        if node_id in self._by_node and not self._by_node[node_id]:
            del self._by_node[node_id]
        if node_id in self._by_old and not self._by_old[node_id]:
            del self._by_old[node_id]
        return dropped

    def expire(self, now: float, max_age_s: float,
               position_of: Callable[[str], Position | None] = lambda node_id: None) -> list[Hint]:
        """Drop the hints taken more than max_age_s before now (last resort) and return those
        whose write the replica (at position_of(node)) still lacks, counting them in
        `expired_unapplied`; the others were applied and only had not been dropped yet."""
        lacking: list[Hint] = []
        heap = self._by_age
        while heap and heap[0][0] <= now - max_age_s:
            added_at, node_id, key = heapq.heappop(heap)
            hint = self._held(key, node_id)
            if hint is not None and hint.added_at == added_at:   # not replaced by a later write
                self._drop(key, node_id)
                replica = position_of(node_id)
                if replica is None or not hint.covered_by(replica):
                    lacking.append(hint)
        self.expired_unapplied += len(lacking)
        return lacking

    def drop_node(self, node_id: str) -> int:
        """Drop every hint of node_id (the node was unlisted); returns how many."""
        keys = [k for k, per_key in self._by_key.items() if node_id in per_key]
        for key in keys:
            self._drop(key, node_id)
        self._by_node.pop(node_id, None)
        self._by_old.pop(node_id, None)
        self._per_node.pop(node_id, None)
        self._by_age = [e for e in self._by_age if e[1] != node_id]
        heapq.heapify(self._by_age)
        return len(keys)

    def count(self, node_id: str) -> int:
        """How many hints node_id holds."""
        return self._per_node.get(node_id, 0)

    def held(self, node_id: str) -> list[Hint]:
        """The hints held for node_id (for tests and diagnostics)."""
        return [per_key[node_id] for per_key in self._by_key.values() if node_id in per_key]

    def lookup(self, key: bytes) -> list[str]:
        per_key = self._by_key.get(key)
        return list(per_key) if per_key else []

    def lookup_many(self, keys: Sequence[bytes]) -> list[list[str]] | None:
        """Hinted nodes per key, or None when no hints are held (the common, fast case)."""
        if not self._count:
            return None
        get = self._by_key.get
        return [list(get(k, ())) for k in keys]

    def nodes(self) -> Iterable[str]:
        return list(self._by_node)

    # -- subscriber -------------------------------------------------------------------------------
    def on_event(self, event: SyncEvent) -> None:
        """A replica that moved drops the hints it now covers; an unlisted node drops all of its."""
        if isinstance(event, (ReplicaAdvanced, ReplicaInstalled)):
            self.applied(event.node_id, event.epoch, event.sequence)
        elif isinstance(event, NodeUnlisted):
            self.drop_node(event.node_id)
