"""The replica feed's logic: what each subscriber of WatchReplicas is sent, without any I/O.

A client doing its own routing keeps a replica of every node's filter (docs/client.md, "Local
routing"). It is fed the way a coordinator is fed by the nodes: per node a Hello and a
snapshot, then deltas, each verified on arrival by the same protocol object
(shardsieve/sync/coordinator_side.py, `CoordinatorSync`) against the node's checksum. The
coordinator only passes on what it verified itself.

- `ReplicaTap` sits between CoordinatorSync and the replicas (a ReplicaSink): it hands every
  verified change set to the publisher, and says when a snapshot install is under way.
- `ReplicaPublisher` follows the coordinator's events (a shell subscriber): each applied
  delta, installed snapshot and unlisted node becomes an entry of one bounded log. Nothing is
  logged while nobody subscribes.
- Each `Subscription` reads the log from its cursor. Its first read, and any read after it
  fell behind the log's floor (entries dropped to keep the log bounded), is a reset: a fresh
  snapshot of every replica. A snapshot is always cut from the replica as it is at that
  moment (position and checksum read under the coordinator's lock, bits from the index), so
  logged deltas it already holds are skipped for that subscriber (`plan`).

The grpc.aio adapter is coordinator/replica_watch.py.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Callable

from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import encode_delta
from shardsieve.snapshot import encode_snapshot
from shardsieve.sync.coordinator_side import (
    PROTOCOL_VERSION,
    NodeState,
    NodeUnlisted,
    ResyncRequested,
    StreamClosed,
    StreamOpened,
    Position,
    ReplicaAdvanced,
    ReplicaInstalled,
    ReplicaSink,
    SnapshotRejected,
    SyncEvent,
)
from shardsieve.v1 import filter_pb2, routing_pb2, sync_pb2

DEFAULT_MAX_ENTRIES = 8192
DEFAULT_MAX_BYTES = 32 << 20
DEFAULT_MAX_SUBSCRIBERS = 64


class FeedFull(Exception):
    """max-replica-subscribers subscriptions are open already."""


@dataclass(eq=False)
class Entry:
    seq: int
    node_id: str
    kind: str                         # "delta", "install" or "unlisted"
    position: Position = (0, 0)
    changes: ChangeSet | None = None
    checksum: int = 0
    key_count: int = 0
    bits: int = 0
    _payload: bytes | None = None

    @property
    def size(self) -> int:
        """Bytes the entry holds (positions at 8 bytes each)."""
        if self.changes is None:
            return 64
        return 64 + 8 * (len(self.changes.set_positions) + len(self.changes.cleared_positions))

    def delta(self) -> filter_pb2.Delta:
        """The entry as the Delta the node sent (encoded once, shared by every subscriber)."""
        if self._payload is None:
            assert self.changes is not None
            self._payload = encode_delta(self.changes, self.bits)
        return filter_pb2.Delta(epoch=self.position[0], sequence=self.position[1], payload=self._payload,
                                checksum=self.checksum, key_count=self.key_count)


@dataclass
class Subscription:
    """One subscriber's place in the log and what it was sent per node."""

    id: int
    cursor: int = 0
    reset_needed: bool = True
    sent: dict[str, Position] = field(default_factory=dict)
    snapshots_sent: int = 0
    resets: int = 0
    notify: Callable[[], None] | None = None


@dataclass(frozen=True)
class Pull:
    """What a subscriber is owed now: a reset (every replica afresh) or log entries."""

    reset: bool
    entries: list[Entry]


@dataclass(frozen=True)
class SnapshotCut:
    """A replica's bits and the position and checksum they are at (read together, under the
    coordinator's lock)."""

    node_id: str
    address: str
    state: NodeState
    packed: bytes


class ReplicaTap:
    """A ReplicaSink that passes everything to `inner` and tells the publisher (see module)."""

    def __init__(self, inner: ReplicaSink, publisher: ReplicaPublisher) -> None:
        self.inner = inner
        self.publisher = publisher

    def install(self, node_id: str, bloom: BloomFilter) -> None:
        self.publisher.installing(node_id)
        self.inner.install(node_id, bloom)

    def apply(self, node_id: str, changes: ChangeSet) -> None:
        self.inner.apply(node_id, changes)
        self.publisher.applied(node_id, changes)

    def remove(self, node_id: str) -> None:
        self.inner.remove(node_id)


class ReplicaPublisher:
    """The bounded log of replica changes and its subscriptions. Thread-safe (its own lock):
    events arrive under the coordinator's lock, installs may start in a worker thread, and
    subscribers read from the event loop."""

    def __init__(self, node_state: Callable[[str], NodeState | None], *, max_entries: int = DEFAULT_MAX_ENTRIES,
                 max_bytes: int = DEFAULT_MAX_BYTES, max_subscribers: int = DEFAULT_MAX_SUBSCRIBERS) -> None:
        """node_state: the coordinator's read of a node (CoordinatorShell.node; called under its lock)."""
        self._node_state = node_state
        self.max_entries = max_entries
        self.max_bytes = max_bytes
        self.max_subscribers = max_subscribers
        self._lock = threading.Lock()
        self._log: list[Entry] = []
        self._head = 0                    # index in _log of the oldest entry kept
        self._bytes = 0
        self._next_seq = 0
        self._pending: dict[str, ChangeSet] = {}
        self._installing: set[str] = set()
        self._subs: dict[int, Subscription] = {}
        self._next_sub = 1

    # -- from the tap and the events ------------------------------------------------------------
    def installing(self, node_id: str) -> None:
        with self._lock:
            self._installing.add(node_id)

    def applied(self, node_id: str, changes: ChangeSet) -> None:
        with self._lock:
            if self._subs:
                self._pending[node_id] = changes

    def on_event(self, event: SyncEvent) -> None:
        """Shell subscriber (runs under the coordinator's lock)."""
        if isinstance(event, ReplicaAdvanced):
            with self._lock:
                changes = self._pending.pop(event.node_id, None)
                if not self._subs or changes is None:
                    return
            state = self._node_state(event.node_id)
            if state is None or state.geometry is None:
                return
            self._append(Entry(0, event.node_id, "delta", (event.epoch, event.sequence), changes, state.checksum,
                               state.key_count, state.geometry.bits))
        elif isinstance(event, ReplicaInstalled):
            with self._lock:
                self._installing.discard(event.node_id)
            self._append(Entry(0, event.node_id, "install", (event.epoch, event.sequence)))
        elif isinstance(event, SnapshotRejected):
            with self._lock:
                self._installing.discard(event.node_id)
        elif isinstance(event, NodeUnlisted):
            with self._lock:
                self._installing.discard(event.node_id)
                self._pending.pop(event.node_id, None)
            self._append(Entry(0, event.node_id, "unlisted"))
        elif isinstance(event, (StreamClosed, StreamOpened, ResyncRequested)):
            self._wake()     # freshness changed: subscribers get new marks now, not at the next interval

    def _wake(self) -> None:
        with self._lock:
            waiting = [s.notify for s in self._subs.values() if s.notify is not None]
        for notify in waiting:
            notify()

    def _append(self, entry: Entry) -> None:
        with self._lock:
            if not self._subs:
                return
            entry.seq = self._next_seq
            self._next_seq += 1
            self._log.append(entry)
            self._bytes += entry.size
            while len(self._log) - self._head > self.max_entries or (
                    self._bytes > self.max_bytes and len(self._log) - self._head > 1):
                self._bytes -= self._log[self._head].size
                self._head += 1
            if self._head > 1024 and self._head * 2 > len(self._log):
                del self._log[:self._head]
                self._head = 0
            waiting = [s.notify for s in self._subs.values() if s.notify is not None]
        for notify in waiting:
            notify()

    # -- subscriptions ----------------------------------------------------------------------------
    def subscribe(self, notify: Callable[[], None] | None = None) -> Subscription:
        """A new subscription (its first pull is a reset). FeedFull past max_subscribers."""
        with self._lock:
            if len(self._subs) >= self.max_subscribers:
                raise FeedFull(f"{len(self._subs)} replica subscribers are connected, the most allowed "
                               f"(setting max-replica-subscribers)")
            sub = Subscription(self._next_sub, cursor=self._next_seq, notify=notify)
            self._next_sub += 1
            self._subs[sub.id] = sub
            return sub

    def unsubscribe(self, sub: Subscription) -> None:
        with self._lock:
            self._subs.pop(sub.id, None)
            if not self._subs:
                self._log, self._head, self._bytes = [], 0, 0
                self._pending.clear()

    @property
    def subscribers(self) -> int:
        with self._lock:
            return len(self._subs)

    def floor(self) -> int:
        """The seq of the oldest entry kept."""
        with self._lock:
            return self._log[self._head].seq if self._head < len(self._log) else self._next_seq

    def pull(self, sub: Subscription, max_entries: int = 1024) -> Pull:
        """What `sub` is owed now; advances its cursor. A reset when it is new or fell behind."""
        with self._lock:
            floor = self._log[self._head].seq if self._head < len(self._log) else self._next_seq
            if sub.reset_needed or sub.cursor < floor:
                sub.reset_needed = False
                sub.cursor = self._next_seq
                sub.resets += 1
                sub.sent.clear()
                return Pull(True, [])
            start = self._head + (sub.cursor - floor)
            entries = self._log[start:start + max_entries]
            sub.cursor += len(entries)
            return Pull(False, entries)

    def has_installs(self, sub: Subscription) -> bool:
        """Whether the entries `sub` is owed include a snapshot to cut (heavy work)."""
        with self._lock:
            floor = self._log[self._head].seq if self._head < len(self._log) else self._next_seq
            start = self._head + max(sub.cursor - floor, 0)
            return any(e.kind == "install" for e in self._log[start:start + 1024])

    def backlog(self, sub: Subscription) -> int:
        with self._lock:
            return self._next_seq - sub.cursor

    # -- snapshots --------------------------------------------------------------------------------
    def cut(self, node_id: str, address: str, packed: Callable[[str], bytes]) -> SnapshotCut | None:
        """The replica of node_id as it is now (call under the coordinator's lock, so no delta
        lands between reading its position and its bits); None without a replica or while a
        snapshot install of it is under way (its ReplicaInstalled entry will follow)."""
        state = self._node_state(node_id)
        with self._lock:
            if node_id in self._installing:
                return None
        if state is None or not state.has_replica or state.geometry is None:
            return None
        return SnapshotCut(node_id, address or state.storage_address, state.frozen_copy(), packed(node_id))

    @staticmethod
    def plan(pull: Pull, replica_nodes: list[str]) -> list[tuple[str, str, Entry | None]]:
        """The steps of one pull, in order: ("snapshot", node, None) for a snapshot to cut,
        ("delta", node, entry) and ("unlisted", node, None)."""
        if pull.reset:
            return [("snapshot", n, None) for n in sorted(replica_nodes)]
        kinds = {"delta": "delta", "install": "snapshot", "unlisted": "unlisted"}
        return [(kinds[e.kind], e.node_id, e if e.kind == "delta" else None) for e in pull.entries]

    @staticmethod
    def keep_delta(sub: Subscription, entry: Entry) -> bool:
        """Whether `sub` can use this delta: it holds a snapshot of the node in the delta's epoch
        and is not already at or past it (a snapshot cut after the delta holds it). Taken
        deltas move the subscriber's position."""
        have = sub.sent.get(entry.node_id)
        if have is None or have[0] != entry.position[0] or entry.position[1] <= have[1]:
            return False
        sub.sent[entry.node_id] = entry.position
        return True

    @staticmethod
    def sent_snapshot(sub: Subscription, cut: SnapshotCut) -> None:
        sub.sent[cut.node_id] = (cut.state.epoch, cut.state.sequence)
        sub.snapshots_sent += 1

    @staticmethod
    def sent_unlisted(sub: Subscription, node_id: str) -> None:
        sub.sent.pop(node_id, None)


def snapshot_updates(cut: SnapshotCut, snapshot_id: int) -> list[routing_pb2.NodeUpdate]:
    """A Hello at the cut's position, then its snapshot chunks: what a node sends on a new sync
    stream (heavy for a large filter: run it off the event loop)."""
    state = cut.state
    geometry = state.geometry
    assert geometry is not None
    bloom = BloomFilter.from_bytes(geometry, cut.packed)
    encoded = encode_snapshot(bloom)
    hello = sync_pb2.Hello(node_id=cut.node_id, storage_address=cut.address, geometry=geometry.to_proto(),
                           epoch=state.epoch, sequence=state.sequence, checksum=state.checksum,
                           key_count=state.key_count, capacity=state.capacity, target_fpr=state.target_fpr,
                           push_interval_ms=state.push_interval_ms, protocol_version=PROTOCOL_VERSION,
                           history_floor=state.sequence)
    updates = [routing_pb2.NodeUpdate(node_id=cut.node_id, hello=hello)]
    for index, data in enumerate(encoded.chunks):
        chunk = filter_pb2.SnapshotChunk(
            snapshot_id=snapshot_id, epoch=state.epoch, sequence=state.sequence, geometry=geometry.to_proto(),
            encoding=encoded.encoding, purpose=filter_pb2.SNAPSHOT_PURPOSE_RESYNC, chunk_index=index,
            chunk_count=encoded.chunk_count, total_bytes=encoded.total_bytes, data=data, checksum=state.checksum,
            key_count=state.key_count, capacity=state.capacity)
        updates.append(routing_pb2.NodeUpdate(node_id=cut.node_id, snapshot_chunk=chunk))
    return updates
