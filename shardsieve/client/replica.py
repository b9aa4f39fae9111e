"""A client's own replica of every node's filter, fed by WatchReplicas: no I/O, thread-safe.

The feed (coordinator/replica_feed.py) sends per node what a node sends a coordinator: a Hello,
a snapshot, then deltas. `LocalReplica` verifies them with the coordinator's own protocol
object (`CoordinatorSync`, shardsieve/sync/coordinator_side.py): a delta is applied only if it
follows the replica's sequence and leads to the checksum the node computed, a snapshot only
if its bits have the node's checksum. Anything that does not verify leaves the replica as it
was and sets `needs_resync`: the feed's consumer then subscribes afresh (a reset).

Candidates come from the coordinator's one merge (coordinator/candidates.py): filter matches,
then read-your-writes hints of this client's own writes, then in safe mode every node that is
not fresh here. A node is fresh here when all hold (docs/client.md, "Local routing"):
1. the coordinator marks it fresh (its freshness rule, stale-after-s);
2. this replica of it is verified and at or past the position the coordinator marked
   (`NodeMark.epoch/sequence`): it lacks nothing the coordinator had then;
3. the feed was heard from within stale-after-s (the client's distance from its last update).
Rule 3 makes every node stale when the feed stalls, so safe mode then lists every node.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Sequence

from shardsieve.client.results import Candidate
from shardsieve.coordinator.candidates import merge
from shardsieve.coordinator.replicas import Replicas
from shardsieve.coordinator.routing_index import RoutingIndex
from shardsieve.sync.coordinator_side import (
    CoordinatorSync,
    Position,
    ResyncRequested,
    SnapshotRejected,
    SyncResult,
)
from shardsieve.sync.errors import SyncError
from shardsieve.v1 import routing_pb2, sync_pb2

DEFAULT_MAX_HINTS = 100_000
DEFAULT_HINT_MAX_AGE_S = 300.0


@dataclass(frozen=True)
class _Hint:
    node_id: str
    position: Position
    at: float


class LocalReplica:
    """Replicas of every node's filter plus the coordinator's marks, verified on arrival."""

    def __init__(self, *, mode: str | None = None, max_hints: int = DEFAULT_MAX_HINTS,
                 hint_max_age_s: float = DEFAULT_HINT_MAX_AGE_S) -> None:
        """mode: 'safe' or 'fast' to override the coordinator's mode (None: follow it)."""
        if mode not in (None, "safe", "fast"):
            raise ValueError(f"mode must be 'safe', 'fast' or None, got {mode!r}")
        self._override_mode = mode
        self._lock = threading.RLock()
        self._replicas = Replicas(RoutingIndex(1))
        self._sync = CoordinatorSync(self._replicas)
        self._streams: dict[str, int] = {}
        self._next_stream = 1
        self._marks: dict[str, routing_pb2.NodeMark] = {}
        self._mode = "safe"
        self._stale_after_s = 2.0
        self._heard_at: float | None = None
        self._resetting: set[str] | None = None
        self._hints: dict[bytes, list[_Hint]] = {}
        self._hint_count = 0
        self.max_hints = max_hints
        self.hint_max_age_s = hint_max_age_s
        self.needs_resync = False
        self.problems: list[str] = []      # why a resync was needed (the latest few)
        self.updates_applied = 0
        self.resets = 0

    # -- the feed ------------------------------------------------------------------------------------
    def apply(self, feed: routing_pb2.ReplicaFeed, now: float) -> None:
        """One ReplicaFeed message, received at `now` (monotonic seconds)."""
        with self._lock:
            self._heard_at = now
            if feed.reset:
                self._resetting = set()
                self.resets += 1
            for update in feed.updates:
                self._update(update, now)
            if feed.HasField("marks"):
                if self._resetting is not None:
                    for node_id in [s.node_id for s in self._sync.nodes()]:
                        if node_id not in self._resetting:
                            self._drop(node_id)
                    self._resetting = None
                self._marks = {m.node_id: m for m in feed.marks.nodes}
                self._mode = feed.marks.mode or "safe"
                self._stale_after_s = feed.marks.stale_after_s or self._stale_after_s

    def _update(self, update: routing_pb2.NodeUpdate, now: float) -> None:
        node_id = update.node_id
        kind = update.WhichOneof("body")
        try:
            if kind == "hello":
                old = self._streams.pop(node_id, None)
                if old is not None:
                    self._sync.close(node_id, old, now)
                stream = self._streams[node_id] = self._next_stream
                self._next_stream += 1
                if self._resetting is not None:
                    self._resetting.add(node_id)
                self._sync.open(stream, update.hello, now)    # asks for the snapshot that follows: expected
            elif kind == "unlisted":
                self._drop(node_id)
            elif kind in ("snapshot_chunk", "delta"):
                stream = self._streams.get(node_id)
                if stream is None:
                    return self._problem(f"{kind} of node {node_id} before its Hello")
                msg = sync_pb2.NodeMessage(snapshot_chunk=update.snapshot_chunk) if kind == "snapshot_chunk" else \
                    sync_pb2.NodeMessage(delta=update.delta)
                self._check(self._sync.receive(node_id, stream, msg, now))
            self.updates_applied += 1
        except SyncError as exc:
            self._problem(f"node {node_id}: {exc}")
        return None

    def _check(self, result: SyncResult) -> None:
        """A change that did not verify (a gap, a checksum mismatch, a rejected snapshot): the
        replica kept its state; the feed must start over."""
        for event in result.events:
            if isinstance(event, (ResyncRequested, SnapshotRejected)):
                self._problem(f"node {event.node_id}: {event.detail}")

    def _problem(self, what: str) -> None:
        self.needs_resync = True
        self.problems = (self.problems + [what])[-8:]

    def _drop(self, node_id: str) -> None:
        self._streams.pop(node_id, None)
        self._check(self._sync.unlist(node_id))
        self._marks.pop(node_id, None)

    def resubscribed(self) -> None:
        """The consumer opened a new subscription (its first message is a reset)."""
        with self._lock:
            self.needs_resync = False

    # -- freshness -----------------------------------------------------------------------------------
    @property
    def mode(self) -> str:
        return self._override_mode or self._mode

    @property
    def stale_after_s(self) -> float:
        return self._stale_after_s

    def feed_age(self, now: float) -> float | None:
        """Seconds since the feed was last heard from (None: never)."""
        with self._lock:
            return None if self._heard_at is None else now - self._heard_at

    def ready(self) -> bool:
        """A first full snapshot has arrived with its marks."""
        with self._lock:
            return self._heard_at is not None and self._resetting is None and self.resets > 0

    def fresh_nodes(self, now: float) -> set[str]:
        """The nodes fresh here (module docstring: marks, position, feed distance)."""
        with self._lock:
            if self._heard_at is None or now - self._heard_at > self._stale_after_s:
                return set()
            synced = self._sync.synced_heard()
            out = set()
            for node_id, mark in self._marks.items():
                if not mark.fresh or node_id not in synced:
                    continue
                position = self._sync.position(node_id)
                if position is not None and position >= (mark.epoch, mark.sequence):
                    out.add(node_id)
            return out

    def addresses(self) -> dict[str, str]:
        with self._lock:
            out = {s.node_id: s.storage_address for s in self._sync.nodes() if s.storage_address}
            out.update({n: m.address for n, m in self._marks.items() if m.address})
            return out

    # -- read-your-writes ------------------------------------------------------------------------------
    def hold(self, key: bytes, node_id: str, epoch: int, sequence: int, now: float) -> bool:
        """A write of `key` that `node_id` acknowledged at (epoch, sequence): listed for `key`
        until this replica holds it (`holds_write`) or hint-max-age passes. False when the
        replica already holds it or max-hints are held (then the write is routable once the
        coordinator marks show its position, which a safe-mode read of a stale node covers)."""
        with self._lock:
            if self._sync.covers(node_id, epoch, sequence):
                return False
            if self._hint_count >= self.max_hints:
                self._expire(now)
                if self._hint_count >= self.max_hints:
                    return False
            self._hints.setdefault(key, []).append(_Hint(node_id, (epoch, sequence), now))
            self._hint_count += 1
            return True

    def _expire(self, now: float) -> None:
        for key in list(self._hints):
            self._keep(key, now)

    def _keep(self, key: bytes, now: float) -> list[str]:
        """The nodes hinted for key, dropping hints the replica covers or that aged out."""
        hints = self._hints.get(key)
        if not hints:
            return []
        kept = [h for h in hints if now - h.at <= self.hint_max_age_s and not self._sync.covers(h.node_id, *h.position)]
        self._hint_count -= len(hints) - len(kept)
        if kept:
            self._hints[key] = kept
        else:
            del self._hints[key]
        return [h.node_id for h in kept]

    @property
    def hints_held(self) -> int:
        with self._lock:
            return self._hint_count

    # -- lookups -------------------------------------------------------------------------------------
    def candidates(self, keys: Sequence[bytes], now: float) -> list[list[Candidate]]:
        """Candidates of each key under the freshness rules above."""
        with self._lock:
            hinted = [self._keep(k, now) for k in keys] if self._hints else None
        fresh = self.fresh_nodes(now)
        addresses = self.addresses()
        found = self._replicas.locate(keys)       # hints first, filters second (coordinator/candidates.py)
        lists = merge(found.offsets, found.nodes, hinted, addresses, fresh, self.mode == "safe")
        return [[Candidate(c.node_id, c.address, c.stale, c.hinted) for c in row] for row in lists.rows()]

    # -- inspection ----------------------------------------------------------------------------------
    def positions(self) -> dict[str, Position]:
        with self._lock:
            return {s.node_id: (s.epoch, s.sequence) for s in self._sync.nodes() if s.has_replica}

    def checksums(self) -> dict[str, int]:
        """Checksum of each verified replica (what the node computed for that position)."""
        with self._lock:
            return {s.node_id: s.checksum for s in self._sync.nodes() if s.has_replica}

    def packed(self, node_id: str) -> bytes:
        return self._replicas.packed(node_id)

    def marks(self) -> dict[str, routing_pb2.NodeMark]:
        with self._lock:
            return dict(self._marks)



