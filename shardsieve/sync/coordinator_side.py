"""Coordinator end of the sync protocol: a plain object, no sockets, threads, clocks or files.

The coordinator daemon owns one `CoordinatorSync` and calls it under one lock from every
stream handler (the object is not thread-safe). The FilterSync servicer is a thin driver:

    out = sync.open(stream_id, first_message.hello, now)         # -> send each of out
    for msg in rest_of_stream: out = sync.receive(node_id, stream_id, msg, now)
    finally: sync.close(node_id, stream_id, now)
    # a SyncError raised by open/receive: end the stream with error.grpc_status_name

`stream_id` is any hashable the driver picks per stream (unique for the process life).
`now` is a float in seconds from a monotonic clock; the object only stores/compares it.

The replica bits live in a `ReplicaSink` (the routing index implements it); this object
keeps per node only the protocol position (epoch, sequence, checksum, geometry) and
bookkeeping. It applies a delta only when it moves the replica from exactly its sequence
to the next and the checksum computed *before* touching the sink matches, so the sink
only ever holds a state the node really had: that is what promise 1 rests on.
"""

from __future__ import annotations

from collections.abc import Hashable
from dataclasses import dataclass, field
from typing import Protocol

from shardsieve.bloom import BloomFilter, FilterDivergedError
from shardsieve.changeset import ChangeSet
from shardsieve.codec import CodecError, decode_delta
from shardsieve.geometry import Geometry, GeometryError
from shardsieve.snapshot import SnapshotAssembler, SnapshotError
from shardsieve.sync.errors import (
    HelloTwice,
    InvalidHello,
    MalformedMessage,
    NotOpened,
    StaleStream,
    UnsupportedProtocolVersion,
    WrongNodeId,
)
from shardsieve.v1 import filter_pb2, sync_pb2

PROTOCOL_VERSION = 1

REASON_NO_REPLICA = sync_pb2.SNAPSHOT_REASON_NO_REPLICA
REASON_GAP = sync_pb2.SNAPSHOT_REASON_GAP
REASON_UNKNOWN_EPOCH = sync_pb2.SNAPSHOT_REASON_UNKNOWN_EPOCH
REASON_CHECKSUM_MISMATCH = sync_pb2.SNAPSHOT_REASON_CHECKSUM_MISMATCH
REASON_BAD_PAYLOAD = sync_pb2.SNAPSHOT_REASON_BAD_PAYLOAD
REASON_BEHIND_HISTORY = sync_pb2.SNAPSHOT_REASON_BEHIND_HISTORY

PURPOSE_REBUILD = filter_pb2.SNAPSHOT_PURPOSE_REBUILD


def reason_name(reason: int) -> str:
    """'GAP', 'NO_REPLICA', ... for a SnapshotReason value (for counters and logs)."""
    try:
        return sync_pb2.SnapshotReason.Name(reason).removeprefix("SNAPSHOT_REASON_")
    except ValueError:
        return str(reason)


# --------------------------------------------------------------------------- the sink


class ReplicaSink(Protocol):
    """Where verified replica bits go (the routing index). Each call is all-or-nothing."""

    def install(self, node_id: str, bloom: BloomFilter) -> None:
        """Atomically replace the node's filter with `bloom` (verified; may be a new geometry)."""

    def apply(self, node_id: str, changes: ChangeSet) -> None:
        """Flip the changed bits in place; raise FilterDivergedError and change nothing if a
        set position is already 1 or a cleared one already 0."""

    def remove(self, node_id: str) -> None:
        """Forget the node's filter."""


class DictReplicaSink:
    """A dict of BloomFilter per node: the reference sink for tests and small tools."""

    def __init__(self) -> None:
        self.replicas: dict[str, BloomFilter] = {}

    def install(self, node_id: str, bloom: BloomFilter) -> None:
        self.replicas[node_id] = bloom

    def apply(self, node_id: str, changes: ChangeSet) -> None:
        self.replicas[node_id].apply(changes)

    def remove(self, node_id: str) -> None:
        self.replicas.pop(node_id, None)


# --------------------------------------------------------------------------- settings and views


@dataclass(frozen=True)
class CoordinatorSyncConfig:
    """Limits of the coordinator end."""

    need_snapshot_retry_s: float = 2.0        # repeat an unanswered NeedSnapshot after this long
    max_snapshot_bytes: int | None = None     # refuse larger encoded snapshots (None: geometry bound)
    max_delta_positions: int | None = None    # refuse deltas with more positions (None: m)

    def __post_init__(self) -> None:
        if not self.need_snapshot_retry_s > 0:
            raise ValueError(f"need_snapshot_retry_s must be > 0, got {self.need_snapshot_retry_s!r}")


@dataclass
class SyncCounters:
    """Per-node counters (monotonic for the life of the coordinator process)."""

    deltas_applied: int = 0
    delta_bytes: int = 0
    duplicates: int = 0
    snapshots_installed: int = 0
    snapshot_bytes: int = 0
    snapshots_rejected: int = 0
    need_snapshot: dict[str, int] = field(default_factory=dict)   # by reason name
    streams_opened: int = 0
    stream_takeovers: int = 0


@dataclass(frozen=True)
class RebuildView:
    """Where a node's rebuild stands, as far as this coordinator knows.

    phase: "" (none), "requested" (we asked), the node's own phases from heartbeats
    ("scanning", "streaming", "awaiting-verify"), "switched" (we installed the new epoch).
    """

    phase: str
    request_id: int
    capacity: int
    target_fpr: float
    reason: str
    requested_at: float | None
    epoch: int
    progress: float
    switched_at: float | None


@dataclass(frozen=True)
class NodeView:
    """Read-only state of one node's replica and stream."""

    node_id: str
    connected: bool
    storage_address: str
    has_replica: bool
    epoch: int
    sequence: int
    checksum: int
    geometry: Geometry | None
    key_count: int
    capacity: int
    target_fpr: float
    push_interval_ms: int
    connected_at: float | None
    disconnected_at: float | None
    last_applied_at: float | None     # last delta applied or snapshot installed
    last_heard_at: float | None       # last message of any kind
    awaiting_snapshot: str | None     # reason name of an outstanding NeedSnapshot
    stats: sync_pb2.NodeStats | None  # latest heartbeat (a copy)
    rebuild: RebuildView
    counters: SyncCounters            # a copy


# --------------------------------------------------------------------------- internal state


@dataclass
class _Assembly:
    snapshot_id: int
    epoch: int
    sequence: int
    purpose: int
    checksum: int
    key_count: int
    capacity: int
    assembler: SnapshotAssembler
    last_chunk_at: float


@dataclass
class _Node:
    node_id: str
    stream_id: Hashable | None = None
    connected: bool = False
    storage_address: str = ""
    capacity: int = 0
    target_fpr: float = 0.0
    push_interval_ms: int = 0
    key_count: int = 0
    connected_at: float | None = None
    disconnected_at: float | None = None
    has_replica: bool = False
    epoch: int = 0
    sequence: int = 0
    checksum: int = 0
    geometry: Geometry | None = None
    last_applied_at: float | None = None
    last_heard_at: float | None = None
    stats: sync_pb2.NodeStats | None = None
    assembly: _Assembly | None = None
    last_snapshot_id: int = 0        # highest snapshot id installed/refused/skipped on this stream
    awaiting: int | None = None      # reason of the outstanding NeedSnapshot
    # the Hello showed the replica is not a state of the node's current history (a node
    # restarted without a new epoch): the next snapshot installs whatever its sequence
    replica_foreign: bool = False
    need_sent_at: float = 0.0
    rebuild_phase: str = ""
    rebuild_request_id: int = 0
    rebuild_capacity: int = 0
    rebuild_target_fpr: float = 0.0
    rebuild_reason: str = ""
    rebuild_requested_at: float | None = None
    rebuild_epoch: int = 0
    rebuild_progress: float = 0.0
    rebuild_switched_at: float | None = None
    counters: SyncCounters = field(default_factory=SyncCounters)


# --------------------------------------------------------------------------- the protocol object


class CoordinatorSync:
    """The coordinator end of FilterSync for every node."""

    def __init__(self, sink: ReplicaSink, config: CoordinatorSyncConfig | None = None) -> None:
        self.sink = sink
        self.config = config or CoordinatorSyncConfig()
        self._nodes: dict[str, _Node] = {}
        self._streams: dict[Hashable, str] = {}       # open stream -> node id
        self._retired_streams: set[Hashable] = set()  # streams taken over by a newer one
        self._next_request_id = 1

    # ------------------------------------------------------------------ streams
    def open(self, stream_id: Hashable, hello: sync_pb2.Hello, now: float) -> list[sync_pb2.CoordinatorMessage]:
        """A node opened a stream with `hello`. Validates it (InvalidHello /
        UnsupportedProtocolVersion / HelloTwice, state unchanged), makes this the node's
        stream (a newer stream takes over an older one) and answers Ack when the replica can
        be caught up from the node's history, else NeedSnapshot with the reason."""
        if stream_id in self._streams or stream_id in self._retired_streams:
            raise HelloTwice(f"stream {stream_id!r} already opened (for node {self._streams.get(stream_id)!r})")
        if not hello.node_id:
            raise InvalidHello("Hello.node_id is empty; every node needs a stable, non-empty id")
        if hello.protocol_version != PROTOCOL_VERSION:
            raise UnsupportedProtocolVersion(
                f"Hello.protocol_version is {hello.protocol_version}; this coordinator speaks {PROTOCOL_VERSION}")
        if not hello.HasField("geometry"):
            raise InvalidHello("Hello.geometry is missing")
        try:
            geometry = Geometry.from_proto(hello.geometry)
        except GeometryError as exc:
            raise InvalidHello(f"Hello.geometry is invalid: {exc}") from exc
        node = self._nodes.get(hello.node_id)
        if node is None:
            node = self._nodes[hello.node_id] = _Node(node_id=hello.node_id)
        if node.stream_id is not None:
            self._streams.pop(node.stream_id, None)
            self._retired_streams.add(node.stream_id)
            node.counters.stream_takeovers += 1
        self._streams[stream_id] = node.node_id
        node.stream_id = stream_id
        node.connected = True
        node.connected_at = now
        node.last_heard_at = now
        node.assembly = None
        node.last_snapshot_id = 0
        node.awaiting = None
        node.storage_address = hello.storage_address
        node.capacity = int(hello.capacity)
        node.target_fpr = float(hello.target_fpr)
        node.push_interval_ms = int(hello.push_interval_ms)
        node.key_count = int(hello.key_count)
        node.counters.streams_opened += 1
        if not node.has_replica:
            return self._need(node, REASON_NO_REPLICA, "no replica of this node (first contact or restart)", now)
        if node.replica_foreign:
            return self._need(node, REASON_UNKNOWN_EPOCH, "replica is not from the node's current history", now)
        if node.epoch != hello.epoch:
            return self._need(node, REASON_UNKNOWN_EPOCH,
                              f"replica is at epoch {node.epoch}, node at epoch {hello.epoch}", now)
        if geometry != node.geometry:
            return self._need(node, REASON_UNKNOWN_EPOCH,
                              f"epoch {hello.epoch} changed geometry from ({node.geometry}) to ({geometry})", now)
        if node.sequence > hello.sequence:
            node.replica_foreign = True   # not a state of this node's current history
            return self._need(node, REASON_UNKNOWN_EPOCH,
                              f"replica is at sequence {node.sequence}, beyond the node's {hello.sequence}", now)
        if node.sequence == hello.sequence and node.checksum != hello.checksum:
            node.replica_foreign = True
            return self._need(node, REASON_CHECKSUM_MISMATCH,
                              f"checksum {node.checksum:#x} at sequence {node.sequence}, node has {hello.checksum:#x}",
                              now)
        if node.sequence < hello.history_floor:
            return self._need(node, REASON_BEHIND_HISTORY,
                              f"replica at sequence {node.sequence} is below the history floor {hello.history_floor}",
                              now)
        return [self._ack(node)]

    def receive(self, node_id: str, stream_id: Hashable, msg: sync_pb2.NodeMessage,
                now: float) -> list[sync_pb2.CoordinatorMessage]:
        """One message on an open stream. Raises (state unchanged) NotOpened / StaleStream /
        WrongNodeId / HelloTwice / MalformedMessage; otherwise returns the replies."""
        node = self._check_stream(node_id, stream_id)
        kind = msg.WhichOneof("body")
        if kind == "hello":
            raise HelloTwice(f"a second Hello on the stream of node {node_id!r}")
        if kind is None:
            raise MalformedMessage(f"node {node_id!r} sent a message with no body")
        node.last_heard_at = now
        if kind == "delta":
            return self._on_delta(node, msg.delta, now)
        if kind == "snapshot_chunk":
            return self._on_chunk(node, msg.snapshot_chunk, now)
        return self._on_heartbeat(node, msg.heartbeat.stats, now)

    def close(self, node_id: str, stream_id: Hashable, now: float | None = None) -> None:
        """The stream ended. The replica stays (routing keeps using it; it turns stale)."""
        self._streams.pop(stream_id, None)
        self._retired_streams.discard(stream_id)
        node = self._nodes.get(node_id)
        if node is not None and node.stream_id == stream_id:
            node.stream_id = None
            node.connected = False
            node.disconnected_at = now
            node.assembly = None
            node.awaiting = None

    def forget(self, node_id: str) -> None:
        """Drop a node entirely (operator decommission): its replica leaves the sink."""
        node = self._nodes.pop(node_id, None)
        if node is not None:
            if node.stream_id is not None:
                self._streams.pop(node.stream_id, None)
            self.sink.remove(node_id)

    def request_rebuild(self, node_id: str, capacity: int, target_fpr: float, reason: str,
                        now: float) -> sync_pb2.CoordinatorMessage:
        """The RebuildRequest to send on the node's stream (the driver sends it). Raises
        KeyError for a node that is not connected, ValueError for bad sizes."""
        node = self._nodes.get(node_id)
        if node is None or not node.connected:
            raise KeyError(f"node {node_id!r} is not connected; a rebuild needs its sync stream")
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise ValueError(f"rebuild capacity must be a positive integer, got {capacity!r}")
        if not 0.0 < target_fpr < 1.0:
            raise ValueError(f"rebuild target_fpr must be between 0 and 1 (exclusive), got {target_fpr!r}")
        request_id = self._next_request_id
        self._next_request_id += 1
        node.rebuild_phase = "requested"
        node.rebuild_request_id = request_id
        node.rebuild_capacity = capacity
        node.rebuild_target_fpr = float(target_fpr)
        node.rebuild_reason = reason
        node.rebuild_requested_at = now
        node.rebuild_progress = 0.0
        node.rebuild_switched_at = None
        return sync_pb2.CoordinatorMessage(
            node_id=node_id,
            rebuild=sync_pb2.RebuildRequest(request_id=request_id, capacity=capacity, target_fpr=target_fpr,
                                            reason=reason))

    # ------------------------------------------------------------------ read-only accessors
    def node_ids(self) -> list[str]:
        return list(self._nodes)

    def node(self, node_id: str) -> NodeView | None:
        """A read-only view of one node, or None if never seen."""
        n = self._nodes.get(node_id)
        if n is None:
            return None
        stats = None
        if n.stats is not None:
            stats = sync_pb2.NodeStats()
            stats.CopyFrom(n.stats)
        c = n.counters
        counters = SyncCounters(**{**c.__dict__, "need_snapshot": dict(c.need_snapshot)})
        return NodeView(
            node_id=n.node_id, connected=n.connected, storage_address=n.storage_address,
            has_replica=n.has_replica, epoch=n.epoch, sequence=n.sequence, checksum=n.checksum,
            geometry=n.geometry, key_count=n.key_count, capacity=n.capacity, target_fpr=n.target_fpr,
            push_interval_ms=n.push_interval_ms, connected_at=n.connected_at, disconnected_at=n.disconnected_at,
            last_applied_at=n.last_applied_at, last_heard_at=n.last_heard_at,
            awaiting_snapshot=reason_name(n.awaiting) if n.awaiting is not None else None, stats=stats,
            rebuild=RebuildView(phase=n.rebuild_phase, request_id=n.rebuild_request_id,
                                capacity=n.rebuild_capacity, target_fpr=n.rebuild_target_fpr,
                                reason=n.rebuild_reason, requested_at=n.rebuild_requested_at,
                                epoch=n.rebuild_epoch, progress=n.rebuild_progress,
                                switched_at=n.rebuild_switched_at),
            counters=counters)

    def nodes(self) -> list[NodeView]:
        return [v for v in (self.node(i) for i in self._nodes) if v is not None]

    def is_connected(self, node_id: str) -> bool:
        n = self._nodes.get(node_id)
        return bool(n and n.connected)

    def position(self, node_id: str) -> tuple[int, int] | None:
        """(epoch, sequence) of the node's replica in the sink, or None without one."""
        n = self._nodes.get(node_id)
        return (n.epoch, n.sequence) if n is not None and n.has_replica else None

    def covers(self, node_id: str, epoch: int, sequence: int) -> bool:
        """True once the replica holds the write a node acknowledged at (epoch, sequence)
        (its WriteAck / NodeSync.pending_sequence): the read-your-writes hint can go."""
        pos = self.position(node_id)
        return pos is not None and pos >= (epoch, sequence)

    # ------------------------------------------------------------------ internals
    def _check_stream(self, node_id: str, stream_id: Hashable) -> _Node:
        owner = self._streams.get(stream_id)
        if owner is None:
            if stream_id in self._retired_streams:
                raise StaleStream(f"stream {stream_id!r} of node {node_id!r} was replaced by a newer stream")
            raise NotOpened(f"stream {stream_id!r} has not sent its Hello (or was closed)")
        if owner != node_id:
            raise WrongNodeId(f"stream {stream_id!r} belongs to node {owner!r}, not {node_id!r}")
        return self._nodes[node_id]

    def _ack(self, node: _Node) -> sync_pb2.CoordinatorMessage:
        assert node.geometry is not None
        return sync_pb2.CoordinatorMessage(
            node_id=node.node_id,
            ack=sync_pb2.Ack(epoch=node.epoch, sequence=node.sequence, geometry=node.geometry.to_proto()))

    def _need(self, node: _Node, reason: int, detail: str, now: float) -> list[sync_pb2.CoordinatorMessage]:
        """NeedSnapshot, at most once per need_snapshot_retry_s while one is outstanding."""
        if node.awaiting is not None and now - node.need_sent_at < self.config.need_snapshot_retry_s:
            return []
        if node.assembly is not None and now - node.assembly.last_chunk_at < self.config.need_snapshot_retry_s:
            return []   # a snapshot is arriving; it will answer this
        node.awaiting = reason
        node.need_sent_at = now
        name = reason_name(reason)
        node.counters.need_snapshot[name] = node.counters.need_snapshot.get(name, 0) + 1
        return [sync_pb2.CoordinatorMessage(
            node_id=node.node_id,
            need_snapshot=sync_pb2.NeedSnapshot(
                reason=reason, have_epoch=node.epoch if node.has_replica else 0,
                have_sequence=node.sequence if node.has_replica else 0, detail=detail))]

    def _on_delta(self, node: _Node, d: filter_pb2.Delta, now: float) -> list[sync_pb2.CoordinatorMessage]:
        if not node.has_replica:
            return self._need(node, REASON_NO_REPLICA, "no replica to apply deltas to", now)
        if d.epoch != node.epoch:
            if d.epoch < node.epoch:
                return []   # a late delta of an epoch we already left
            return self._need(node, REASON_UNKNOWN_EPOCH,
                              f"delta of epoch {d.epoch}, replica at epoch {node.epoch}", now)
        if node.replica_foreign:
            return self._need(node, REASON_UNKNOWN_EPOCH, "replica is not from the node's current history", now)
        if d.sequence <= node.sequence:
            node.counters.duplicates += 1
            return [self._ack(node)]
        if d.sequence > node.sequence + 1:
            return self._need(node, REASON_GAP, f"delta {d.sequence} after {node.sequence}", now)
        assert node.geometry is not None
        try:
            changes = decode_delta(d.payload, node.geometry.bits, max_positions=self.config.max_delta_positions)
        except CodecError as exc:
            return self._need(node, REASON_BAD_PAYLOAD, f"delta {d.sequence}: {exc}", now)
        expected = changes.checksum_after(node.checksum)
        if expected != d.checksum:
            return self._need(node, REASON_CHECKSUM_MISMATCH,
                              f"delta {d.sequence} leads to checksum {expected:#x}, node says {d.checksum:#x}", now)
        try:
            self.sink.apply(node.node_id, changes)
        except FilterDivergedError as exc:
            return self._need(node, REASON_CHECKSUM_MISMATCH, f"delta {d.sequence} does not fit the replica: {exc}",
                              now)
        node.sequence = d.sequence
        node.checksum = d.checksum
        node.key_count = int(d.key_count)
        node.last_applied_at = now
        node.awaiting = None
        node.counters.deltas_applied += 1
        node.counters.delta_bytes += len(d.payload)
        return [self._ack(node)]

    @staticmethod
    def _replica_holds(node: _Node, epoch: int, sequence: int, checksum: int) -> bool:
        """Whether the replica already holds what a snapshot at (epoch, sequence) describes: the
        same history at or past that sequence. At the very same sequence the checksums must
        agree too; if they differ the replica diverged from the node and the snapshot replaces
        it. (Behind the replica's sequence there is nothing to compare: every delta since was
        verified against the node's checksum when it was applied.)"""
        if not node.has_replica or node.replica_foreign or epoch != node.epoch or sequence > node.sequence:
            return False
        return sequence < node.sequence or checksum == node.checksum

    def _already_have(self, node: _Node, c: filter_pb2.SnapshotChunk) -> list[sync_pb2.CoordinatorMessage]:
        """Replies to a snapshot that is not newer than the replica: confirm where we are."""
        out = []
        if c.purpose == PURPOSE_REBUILD and c.epoch == node.epoch:
            out.append(sync_pb2.CoordinatorMessage(
                node_id=node.node_id,
                snapshot_verified=sync_pb2.SnapshotVerified(snapshot_id=c.snapshot_id, epoch=node.epoch,
                                                            sequence=node.sequence)))
        out.append(self._ack(node))
        return out

    def _reject(self, node: _Node, snapshot_id: int, detail: str) -> list[sync_pb2.CoordinatorMessage]:
        node.assembly = None
        node.last_snapshot_id = max(node.last_snapshot_id, snapshot_id)
        node.counters.snapshots_rejected += 1
        return [sync_pb2.CoordinatorMessage(
            node_id=node.node_id, snapshot_rejected=sync_pb2.SnapshotRejected(snapshot_id=snapshot_id, detail=detail))]

    def _on_chunk(self, node: _Node, c: filter_pb2.SnapshotChunk, now: float) -> list[sync_pb2.CoordinatorMessage]:
        asm = node.assembly
        if asm is None or c.snapshot_id != asm.snapshot_id:
            if c.snapshot_id <= node.last_snapshot_id or (asm is not None and c.snapshot_id < asm.snapshot_id):
                return []   # a late chunk of an attempt already settled or superseded
            if self._replica_holds(node, int(c.epoch), int(c.sequence), int(c.checksum)):
                node.last_snapshot_id = c.snapshot_id
                return self._already_have(node, c)
            if not c.HasField("geometry"):
                return self._reject(node, c.snapshot_id, "snapshot chunk has no geometry")
            try:
                geometry = Geometry.from_proto(c.geometry)
                assembler = SnapshotAssembler(geometry, encoding=int(c.encoding), chunk_count=int(c.chunk_count),
                                              total_bytes=int(c.total_bytes), checksum=int(c.checksum),
                                              max_total_bytes=self.config.max_snapshot_bytes)
            except (GeometryError, SnapshotError) as exc:
                return self._reject(node, c.snapshot_id, f"snapshot {c.snapshot_id}: {exc}")
            asm = node.assembly = _Assembly(
                snapshot_id=c.snapshot_id, epoch=int(c.epoch), sequence=int(c.sequence), purpose=int(c.purpose),
                checksum=int(c.checksum), key_count=int(c.key_count), capacity=int(c.capacity),
                assembler=assembler, last_chunk_at=now)
        if (c.epoch, c.sequence, c.checksum, c.chunk_count, c.total_bytes) != (
                asm.epoch, asm.sequence, asm.checksum, asm.assembler.chunk_count, asm.assembler.total_bytes):
            return self._reject(node, c.snapshot_id, f"chunk {c.chunk_index} of snapshot {c.snapshot_id} "
                                                     "disagrees with its first chunk's header")
        try:
            asm.assembler.add(int(c.chunk_index), c.data)
        except SnapshotError as exc:
            return self._reject(node, c.snapshot_id, f"snapshot {c.snapshot_id}: {exc}")
        asm.last_chunk_at = now
        if not asm.assembler.complete:
            return []
        if self._replica_holds(node, asm.epoch, asm.sequence, asm.checksum):
            # deltas moved the replica past this snapshot while it assembled: installing it
            # would take back changes already applied (and keys already routable)
            node.assembly = None
            node.last_snapshot_id = asm.snapshot_id
            return self._already_have(node, c)
        try:
            bloom = asm.assembler.finish()
        except SnapshotError as exc:
            return self._reject(node, c.snapshot_id, f"snapshot {c.snapshot_id}: {exc}")
        self.sink.install(node.node_id, bloom)
        node.assembly = None
        node.last_snapshot_id = asm.snapshot_id
        node.has_replica = True
        node.replica_foreign = False
        node.epoch = asm.epoch
        node.sequence = asm.sequence
        node.checksum = asm.checksum
        node.geometry = bloom.geometry
        node.key_count = asm.key_count
        if asm.capacity:
            node.capacity = asm.capacity
        node.last_applied_at = now
        node.awaiting = None
        node.counters.snapshots_installed += 1
        node.counters.snapshot_bytes += asm.assembler.total_bytes
        out = []
        if asm.purpose == PURPOSE_REBUILD:
            node.rebuild_phase = "switched"
            node.rebuild_epoch = asm.epoch
            node.rebuild_progress = 1.0
            node.rebuild_switched_at = now
            out.append(sync_pb2.CoordinatorMessage(
                node_id=node.node_id,
                snapshot_verified=sync_pb2.SnapshotVerified(snapshot_id=asm.snapshot_id, epoch=asm.epoch,
                                                            sequence=asm.sequence)))
        out.append(self._ack(node))
        return out

    def _on_heartbeat(self, node: _Node, stats: sync_pb2.NodeStats, now: float) -> list[sync_pb2.CoordinatorMessage]:
        node.stats = sync_pb2.NodeStats()
        node.stats.CopyFrom(stats)
        if stats.rebuild_phase:
            node.rebuild_phase = stats.rebuild_phase
            node.rebuild_epoch = int(stats.rebuild_epoch)
            node.rebuild_progress = float(stats.rebuild_progress)
        if not node.has_replica:
            return self._need(node, REASON_NO_REPLICA, "no replica of this node", now)
        if node.awaiting is not None:
            return self._need(node, node.awaiting, "still waiting for a snapshot", now)
        # always answer: a position report lets the node resend what we lack, and answers a
        # Hello whose reply was lost
        return [self._ack(node)]
