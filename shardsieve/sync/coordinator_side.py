"""Coordinator end of the sync protocol: a plain object, no sockets, threads, clocks or files.

`CoordinatorSync` is the one owner of what a coordinator knows about each node: its stream,
address, protocol position, geometry, key count and sizing, when it was last heard from and
last applied, an outstanding snapshot request, its latest stats, the rebuild asked of it and
its counters (docs/architecture.md#who-owns-which-state). Everyone else reads that state
through `node(node_id)`, a typed read-only `NodeState`, never a copy.

Every mutating call returns one `SyncResult`: the replies to send and the events that say
what changed, in order (docs/architecture.md#how-events-flow). The coordinator's shell calls
it under one lock (the object is not thread-safe), sends the replies on the node's stream and
hands the events to its subscribers:

    result = sync.open(stream_id, first_message.hello, now)
    for msg in rest_of_stream: result = sync.receive(node_id, stream_id, msg, now)
    finally: sync.close(node_id, stream_id, now)
    # a SyncError raised by open/receive: end the stream with error.grpc_status_name

`stream_id` is any hashable the driver picks per stream (unique for the process life).
`now` is a float in seconds from a monotonic clock; the object only stores/compares it.

Installing a complete snapshot is the one heavy step (decode the chunks, verify the checksum,
install megabytes in the sink). With `CoordinatorSyncConfig.install_off_call` the call that
completes a snapshot does not do it: its result carries a `SnapshotInstall`, the caller runs
`run_install(job)` wherever it likes (a worker thread; it touches only the job and the sink)
and then hands the job to `finish_install(job, now)` for the state commit, making no other
call for that node in between (coordinator/sync_service.py).

The replica bits live in a `ReplicaSink` (the routing index implements it). A delta is
applied only when it moves the replica from exactly its sequence to the next and the checksum
computed *before* touching the sink matches, so the sink only ever holds a state the node
really had: docs/architecture.md#1-no-false-negatives-once-synced rests on that.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Hashable, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Protocol

from shardsieve.bloom import BloomFilter, FilterDivergedError
from shardsieve.changeset import ChangeSet
from shardsieve.codec import CodecError, decode_delta
from shardsieve.geometry import Geometry, GeometryError
from shardsieve.limits import node_id_problem
from shardsieve.snapshot import SnapshotAssembler, SnapshotError
from shardsieve.sync.bounds import MAX_EPOCH, MAX_SEQUENCE
from shardsieve.sync.errors import (
    EpochBehindReplica,
    FloorAboveSequence,
    HelloTwice,
    InvalidHello,
    MalformedMessage,
    NotOpened,
    PositionOutOfRange,
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

Position = tuple[int, int]
"""(epoch, sequence): a state of a node's filter; positions compare as tuples."""


def reason_name(reason: int) -> str:
    """'GAP', 'NO_REPLICA', ... for a SnapshotReason value (for counters and logs)."""
    try:
        return sync_pb2.SnapshotReason.Name(reason).removeprefix("SNAPSHOT_REASON_")
    except ValueError:
        return str(reason)


def holds_write(replica: Position, position: Position, old: Position | None = None) -> bool:
    """Whether a replica at `replica` certainly holds a write the node acknowledged at `position`.

    The one statement of the rule (docs/sync-protocol.md, "Why the promises hold", promise 2):
    a replica at or past `position` holds it (a later epoch is reached only through a verified
    snapshot cut after the write). A write made during a rebuild hand-over also landed in the
    old epoch's filter at `old`; a replica in exactly that epoch at or past it holds the write
    too. A replica that left the old epoch went through a snapshot that may predate the write,
    so then only `position` counts.
    """
    if replica >= position:
        return True
    return old is not None and replica[0] == old[0] and replica[1] >= old[1]


# --------------------------------------------------------------------------- the sink


class ReplicaSink(Protocol):
    """Where verified replica bits go (the routing index). Each call is all-or-nothing."""

    def install(self, node_id: str, bloom: BloomFilter) -> None:
        """Atomically replace the node's filter with `bloom` (verified; may be a new geometry)."""

    def apply(self, node_id: str, changes: ChangeSet) -> None:
        """Flip the changed bits in place; raise FilterDivergedError and change nothing if a
        set position is already 1 or a cleared one already 0."""

    def remove(self, node_id: str) -> None:
        """Drop the node's filter."""


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


# --------------------------------------------------------------------------- events


@dataclass(frozen=True, slots=True)
class StreamOpened:
    """A node opened a stream (its Hello was valid); it is the node's stream from now on."""

    node_id: str
    stream_id: Hashable
    address: str                       # storage address from the Hello
    took_over: bool                    # the node's previous stream was still open...
    replaced_stream: Hashable | None   # ...this one, now retired (StaleStream on its next message)


@dataclass(frozen=True, slots=True)
class StreamClosed:
    """The node's current stream ended: it is disconnected (its replica stays, and turns stale)."""

    node_id: str
    stream_id: Hashable


@dataclass(frozen=True, slots=True)
class ReplicaAdvanced:
    """A verified delta was applied: the replica is at (epoch, sequence)."""

    node_id: str
    epoch: int
    sequence: int


@dataclass(frozen=True, slots=True)
class ReplicaInstalled:
    """A verified snapshot replaced the replica: it is at (epoch, sequence) with `geometry`.
    `rebuild`: it was the node's rebuilt filter (the node switched to it)."""

    node_id: str
    epoch: int
    sequence: int
    geometry: Geometry
    rebuild: bool


@dataclass(frozen=True, slots=True)
class ResyncRequested:
    """A NeedSnapshot went out: the replica may lack changes until a snapshot arrives."""

    node_id: str
    reason: str                        # reason name: 'GAP', 'NO_REPLICA', ...
    detail: str


@dataclass(frozen=True, slots=True)
class SnapshotRejected:
    """A snapshot failed verification and was refused; the replica is unchanged."""

    node_id: str
    snapshot_id: int
    detail: str


@dataclass(frozen=True, slots=True)
class StatsReported:
    """A heartbeat brought the node's stats (the message is stored; do not modify it)."""

    node_id: str
    stats: sync_pb2.NodeStats


@dataclass(frozen=True, slots=True)
class RebuildRequested:
    """A RebuildRequest went out on the node's stream."""

    node_id: str
    request_id: int
    capacity: int
    target_fpr: float
    reason: str


@dataclass(frozen=True, slots=True)
class NodeUnlisted:
    """The node was dropped for good (an operator unlisted it); its replica left the sink.
    Sent even when this object never heard of the node, so every subscriber drops it."""

    node_id: str
    was_connected: bool
    had_replica: bool
    key_count: int


SyncEvent = (StreamOpened | StreamClosed | ReplicaAdvanced | ReplicaInstalled | ResyncRequested
             | SnapshotRejected | StatsReported | RebuildRequested | NodeUnlisted)


@dataclass(frozen=True, slots=True)
class SyncResult:
    """What one call did: replies for the node's stream, and events for the subscribers, in order."""

    replies: tuple[sync_pb2.CoordinatorMessage, ...] = ()
    events: tuple[SyncEvent, ...] = ()
    install: SnapshotInstall | None = None    # with install_off_call: a snapshot to install (module docstring)


NOTHING = SyncResult()


class _Outcome:
    """Collects one call's replies and events."""

    __slots__ = ("replies", "events", "install")

    def __init__(self) -> None:
        self.replies: list[sync_pb2.CoordinatorMessage] = []
        self.events: list[SyncEvent] = []
        self.install: SnapshotInstall | None = None

    def result(self) -> SyncResult:
        return SyncResult(tuple(self.replies), tuple(self.events), self.install)


# --------------------------------------------------------------------------- settings and state


@dataclass(frozen=True)
class CoordinatorSyncConfig:
    """Limits of the coordinator end."""

    need_snapshot_retry_s: float = 2.0        # repeat an unanswered NeedSnapshot after this long
    max_snapshot_bytes: int | None = None     # refuse larger encoded snapshots (None: geometry bound)
    max_delta_positions: int | None = None    # refuse deltas with more positions (None: m)
    install_off_call: bool = False            # hand complete snapshots out as SnapshotInstall jobs

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
class RebuildTracking:
    """Where a node's rebuild stands, as far as this coordinator knows.

    phase: "" (none), "requested" (we asked), the node's own phases from heartbeats
    ("scanning", "streaming", "awaiting-verify"), "switched" (we installed the new epoch).
    """

    phase: str = ""
    request_id: int = 0
    capacity: int = 0
    target_fpr: float = 0.0
    reason: str = ""
    requested_at: float | None = None
    epoch: int = 0
    progress: float = 0.0
    switched_at: float | None = None


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


@dataclass(eq=False)
class SnapshotInstall:
    """A complete snapshot of one node, to decode and install outside the call that completed
    it (`run_install`), then to commit (`finish_install`)."""

    node_id: str
    assembly: _Assembly
    bloom: BloomFilter | None = None    # set by run_install once decoded and verified
    error: str = ""                     # set by run_install when the snapshot does not decode

    @property
    def total_bytes(self) -> int:
        return self.assembly.assembler.total_bytes


@dataclass(eq=False)
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
    stats: sync_pb2.NodeStats | None = None   # replaced, never modified, by each heartbeat
    assembly: _Assembly | None = None
    last_snapshot_id: int = 0        # highest snapshot id installed/refused/skipped on this stream
    awaiting: int | None = None      # reason of the outstanding NeedSnapshot
    # the Hello showed the replica is not a state of the node's current history (a node
    # restarted without a new epoch): the next snapshot installs whatever its sequence
    replica_foreign: bool = False
    # (epoch, sequence) the Hello of the current stream announced: the node's snapshots on this
    # stream are never older (docs/sync-protocol.md, "Positions that cannot follow")
    hello_position: Position = (0, 0)
    need_sent_at: float = 0.0
    rebuild: RebuildTracking = field(default_factory=RebuildTracking)
    counters: SyncCounters = field(default_factory=SyncCounters)
    state: NodeState = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self.state = NodeState(self)

    @property
    def synced(self) -> bool:
        return self.connected and self.has_replica and self.awaiting is None


class NodeState:
    """Read-only access to one node's live state (no copy: it shows the current values).

    Read it under the lock the coordinator calls CoordinatorSync under, like every other use
    of the object; `stats` is the latest heartbeat's message (treat it as read-only).
    """

    __slots__ = ("_n",)

    def __init__(self, node: _Node) -> None:
        self._n = node

    def frozen_copy(self) -> NodeState:
        """A copy that does not follow later changes (tests and diagnostics comparing a before
        with an after); the coordinator itself always reads the live state."""
        n = self._n
        counters = dataclasses.replace(n.counters, need_snapshot=dict(n.counters.need_snapshot))
        return dataclasses.replace(n, assembly=None, counters=counters).state

    def __repr__(self) -> str:
        n = self._n
        return (f"NodeState({n.node_id!r}, connected={n.connected}, replica="
                f"{(n.epoch, n.sequence) if n.has_replica else None}, awaiting={self.awaiting_snapshot})")

    @property
    def node_id(self) -> str:
        return self._n.node_id

    @property
    def connected(self) -> bool:
        """A stream of the node is open."""
        return self._n.connected

    @property
    def storage_address(self) -> str:
        """Storage address from the node's latest Hello ('' before any)."""
        return self._n.storage_address

    @property
    def has_replica(self) -> bool:
        """A verified replica of the node's filter is in the sink."""
        return self._n.has_replica

    @property
    def synced(self) -> bool:
        """Stream open, verified replica, no snapshot outstanding (the replica may lack nothing
        the node sent); freshness then only depends on when the node was last heard from."""
        return self._n.synced

    @property
    def synced_heard_at(self) -> float | None:
        """When the node was last heard from if it is synced, else None (the freshness input)."""
        n = self._n
        return n.last_heard_at if n.synced else None

    @property
    def epoch(self) -> int:
        return self._n.epoch

    @property
    def sequence(self) -> int:
        return self._n.sequence

    @property
    def position(self) -> Position | None:
        """(epoch, sequence) of the replica, or None without one."""
        n = self._n
        return (n.epoch, n.sequence) if n.has_replica else None

    @property
    def checksum(self) -> int:
        """Checksum of the replica at its position."""
        return self._n.checksum

    @property
    def geometry(self) -> Geometry | None:
        """Geometry of the replica (None before the first snapshot)."""
        return self._n.geometry

    @property
    def key_count(self) -> int:
        return self._n.key_count

    @property
    def capacity(self) -> int:
        return self._n.capacity

    @property
    def target_fpr(self) -> float:
        return self._n.target_fpr

    @property
    def push_interval_ms(self) -> int:
        return self._n.push_interval_ms

    @property
    def connected_at(self) -> float | None:
        return self._n.connected_at

    @property
    def disconnected_at(self) -> float | None:
        return self._n.disconnected_at

    @property
    def last_applied_at(self) -> float | None:
        """When a delta was last applied or a snapshot installed."""
        return self._n.last_applied_at

    @property
    def last_heard_at(self) -> float | None:
        """When the node last sent anything."""
        return self._n.last_heard_at

    @property
    def awaiting_snapshot(self) -> str | None:
        """Reason name of an outstanding NeedSnapshot (the replica may lack changes), else None."""
        awaiting = self._n.awaiting
        return reason_name(awaiting) if awaiting is not None else None

    @property
    def stats(self) -> sync_pb2.NodeStats | None:
        """The latest heartbeat's stats (None before any)."""
        return self._n.stats

    @property
    def rebuild(self) -> RebuildTracking:
        return self._n.rebuild

    @property
    def counters(self) -> SyncCounters:
        """The node's counters (a copy: they keep counting)."""
        c = self._n.counters
        return dataclasses.replace(c, need_snapshot=dict(c.need_snapshot))


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
        # node id -> last_heard_at of every node synced, kept current by each call: lookups
        # read it on every call, so it is an index here rather than a pass over all nodes
        self._synced_heard: dict[str, float] = {}
        self._synced_heard_view = MappingProxyType(self._synced_heard)
        # counts the changes to `_synced_heard` other than a node heard from again later: a node
        # joining or leaving it, or a time going back (`synced_changes`)
        self._synced_changes = 0

    def _note(self, node: _Node) -> None:
        """Keep `_synced_heard` current after a call touched `node`."""
        heard = node.last_heard_at
        if node.synced and heard is not None:
            before = self._synced_heard.get(node.node_id)
            if before is None or heard < before:
                self._synced_changes += 1
            self._synced_heard[node.node_id] = heard
        elif self._synced_heard.pop(node.node_id, None) is not None:
            self._synced_changes += 1

    # ------------------------------------------------------------------ streams
    def open(self, stream_id: Hashable, hello: sync_pb2.Hello, now: float) -> SyncResult:
        """A node opened a stream with `hello`. Validates it (InvalidHello for a node id outside
        the alphabet or a bad geometry, UnsupportedProtocolVersion, HelloTwice, and the position
        rules: PositionOutOfRange, FloorAboveSequence, EpochBehindReplica; state unchanged),
        makes this the node's stream (a newer stream takes over an older one) and answers Ack
        when the replica can be caught up from the node's history, else NeedSnapshot."""
        if stream_id in self._streams or stream_id in self._retired_streams:
            raise HelloTwice(f"stream {stream_id!r} already opened (for node {self._streams.get(stream_id)!r})")
        problem = node_id_problem(hello.node_id)
        if problem:
            raise InvalidHello(f"Hello.node_id: {problem}")
        if hello.protocol_version != PROTOCOL_VERSION:
            raise UnsupportedProtocolVersion(
                f"Hello.protocol_version is {hello.protocol_version}; this coordinator speaks {PROTOCOL_VERSION}")
        if not hello.HasField("geometry"):
            raise InvalidHello("Hello.geometry is missing")
        try:
            geometry = Geometry.from_proto(hello.geometry)
        except GeometryError as exc:
            raise InvalidHello(f"Hello.geometry is invalid: {exc}") from exc
        self._refuse_hello_position(hello)
        out = _Outcome()
        node = self._nodes.get(hello.node_id)
        if node is None:
            node = self._nodes[hello.node_id] = _Node(node_id=hello.node_id)
        replaced = node.stream_id
        if replaced is not None:
            self._streams.pop(replaced, None)
            self._retired_streams.add(replaced)
            node.counters.stream_takeovers += 1
        self._streams[stream_id] = node.node_id
        node.stream_id = stream_id
        node.connected = True
        node.connected_at = now
        node.last_heard_at = now
        node.assembly = None
        node.last_snapshot_id = 0
        node.awaiting = None
        node.hello_position = (int(hello.epoch), int(hello.sequence))
        node.storage_address = hello.storage_address
        node.capacity = int(hello.capacity)
        node.target_fpr = float(hello.target_fpr)
        node.push_interval_ms = int(hello.push_interval_ms)
        node.key_count = int(hello.key_count)
        node.counters.streams_opened += 1
        out.events.append(StreamOpened(node.node_id, stream_id, hello.storage_address, replaced is not None,
                                       replaced))
        self._answer_hello(node, hello, geometry, now, out)
        self._note(node)
        return out.result()

    def _answer_hello(self, node: _Node, hello: sync_pb2.Hello, geometry: Geometry, now: float,
                      out: _Outcome) -> None:
        if not node.has_replica:
            self._need(node, REASON_NO_REPLICA, "no replica of this node (first contact or restart)", now, out)
        elif node.replica_foreign:
            self._need(node, REASON_UNKNOWN_EPOCH, "replica is not from the node's current history", now, out)
        elif node.epoch != hello.epoch:
            self._need(node, REASON_UNKNOWN_EPOCH, f"replica is at epoch {node.epoch}, node at epoch {hello.epoch}",
                       now, out)
        elif geometry != node.geometry:
            self._need(node, REASON_UNKNOWN_EPOCH,
                       f"epoch {hello.epoch} changed geometry from ({node.geometry}) to ({geometry})", now, out)
        elif node.sequence > hello.sequence:
            node.replica_foreign = True   # not a state of this node's current history
            self._need(node, REASON_UNKNOWN_EPOCH,
                       f"replica is at sequence {node.sequence}, beyond the node's {hello.sequence}", now, out)
        elif node.sequence == hello.sequence and node.checksum != hello.checksum:
            node.replica_foreign = True
            self._need(node, REASON_CHECKSUM_MISMATCH,
                       f"checksum {node.checksum:#x} at sequence {node.sequence}, node has {hello.checksum:#x}",
                       now, out)
        elif node.sequence < hello.history_floor:
            self._need(node, REASON_BEHIND_HISTORY,
                       f"replica at sequence {node.sequence} is below the history floor {hello.history_floor}",
                       now, out)
        else:
            out.replies.append(self._ack(node))

    def receive(self, node_id: str, stream_id: Hashable, msg: sync_pb2.NodeMessage, now: float) -> SyncResult:
        """One message on an open stream. Raises (state unchanged) NotOpened / StaleStream /
        WrongNodeId / HelloTwice / MalformedMessage, and for a delta that cannot follow the
        replica PositionOutOfRange / EpochBehindReplica; otherwise returns replies and events."""
        node = self._check_stream(node_id, stream_id)
        kind = msg.WhichOneof("body")
        if kind == "hello":
            raise HelloTwice(f"a second Hello on the stream of node {node_id!r}")
        if kind is None:
            raise MalformedMessage(f"node {node_id!r} sent a message with no body")
        if kind == "delta":
            self._refuse_delta_position(node, msg.delta)
        node.last_heard_at = now
        out = _Outcome()
        if kind == "delta":
            self._on_delta(node, msg.delta, now, out)
        elif kind == "snapshot_chunk":
            self._on_chunk(node, msg.snapshot_chunk, now, out)
        else:
            self._on_heartbeat(node, msg.heartbeat.stats, now, out)
        self._note(node)
        return out.result()

    def close(self, node_id: str, stream_id: Hashable, now: float | None = None) -> SyncResult:
        """The stream ended. The replica stays (routing keeps using it; it turns stale)."""
        self._streams.pop(stream_id, None)
        self._retired_streams.discard(stream_id)
        node = self._nodes.get(node_id)
        if node is None or node.stream_id != stream_id:
            return NOTHING   # a retired stream, or a node unlisted meanwhile
        node.stream_id = None
        node.connected = False
        node.disconnected_at = now
        node.assembly = None
        node.awaiting = None
        self._note(node)
        return SyncResult(events=(StreamClosed(node_id, stream_id),))

    def unlist(self, node_id: str) -> SyncResult:
        """Drop a node entirely (an operator unlisted it): its replica leaves the sink. The
        NodeUnlisted event goes out whether or not this object knew the node."""
        node = self._nodes.pop(node_id, None)
        if self._synced_heard.pop(node_id, None) is not None:
            self._synced_changes += 1
        if node is None:
            return SyncResult(events=(NodeUnlisted(node_id, False, False, 0),))
        if node.stream_id is not None:
            self._streams.pop(node.stream_id, None)
        self.sink.remove(node_id)
        return SyncResult(events=(NodeUnlisted(node_id, node.connected, node.has_replica, node.key_count),))

    def request_rebuild(self, node_id: str, capacity: int, target_fpr: float, reason: str,
                        now: float) -> SyncResult:
        """The RebuildRequest to send on the node's stream (in `replies`). Raises KeyError for a
        node that is not connected, ValueError for bad sizes (nothing changes then)."""
        node = self._nodes.get(node_id)
        if node is None or not node.connected:
            raise KeyError(f"node {node_id!r} is not connected; a rebuild needs its sync stream")
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise ValueError(f"rebuild capacity must be a positive integer, got {capacity!r}")
        if not 0.0 < target_fpr < 1.0:
            raise ValueError(f"rebuild target_fpr must be between 0 and 1 (exclusive), got {target_fpr!r}")
        request_id = self._next_request_id
        self._next_request_id += 1
        node.rebuild = RebuildTracking(phase="requested", request_id=request_id, capacity=capacity,
                                       target_fpr=float(target_fpr), reason=reason, requested_at=now,
                                       epoch=node.rebuild.epoch)
        msg = sync_pb2.CoordinatorMessage(
            node_id=node_id,
            rebuild=sync_pb2.RebuildRequest(request_id=request_id, capacity=capacity, target_fpr=target_fpr,
                                            reason=reason))
        return SyncResult((msg,), (RebuildRequested(node_id, request_id, capacity, float(target_fpr), reason),))

    # ------------------------------------------------------------------ read-only access
    def node_ids(self) -> list[str]:
        return list(self._nodes)

    def node(self, node_id: str) -> NodeState | None:
        """The live, read-only state of one node, or None if never seen (or unlisted)."""
        n = self._nodes.get(node_id)
        return n.state if n is not None else None

    def nodes(self) -> list[NodeState]:
        return [n.state for n in self._nodes.values()]

    def synced_heard(self) -> Mapping[str, float]:
        """`synced_heard_at` of every node synced (a live read-only mapping: no copy)."""
        return self._synced_heard_view

    def synced_changes(self) -> int:
        """How often `synced_heard` changed otherwise than by a node synced being heard from again
        at a later time (a node became synced or stopped being synced, or a time went back). While
        it stays the same, the synced nodes are the same and their times only grew, so what a
        reader derived from the mapping earlier may still hold (coordinator/membership.py FreshNodes)."""
        return self._synced_changes

    def is_connected(self, node_id: str) -> bool:
        n = self._nodes.get(node_id)
        return bool(n and n.connected)

    def position(self, node_id: str) -> Position | None:
        """(epoch, sequence) of the node's replica in the sink, or None without one."""
        n = self._nodes.get(node_id)
        return (n.epoch, n.sequence) if n is not None and n.has_replica else None

    def covers(self, node_id: str, epoch: int, sequence: int, old: Position | None = None) -> bool:
        """True once the replica holds the write a node acknowledged at (epoch, sequence) (its
        WriteAck / NodeSync.pending_sequence; `old`: the WriteAck's old_position during a
        hand-over): the read-your-writes hint can go (`holds_write`)."""
        pos = self.position(node_id)
        return pos is not None and holds_write(pos, (epoch, sequence), old)

    # ------------------------------------------------------------------ positions that cannot follow
    # docs/sync-protocol.md, "Positions that cannot follow": each check runs before anything
    # changes and names the numbers it compared.

    def _refuse_hello_position(self, hello: sync_pb2.Hello) -> None:
        """Raise for a Hello whose position no honest node can announce (state unchanged)."""
        epoch, sequence, floor = int(hello.epoch), int(hello.sequence), int(hello.history_floor)
        if epoch > MAX_EPOCH or sequence > MAX_SEQUENCE:
            raise PositionOutOfRange(
                f"Hello of node {hello.node_id!r} names epoch {epoch}, sequence {sequence}; the largest a position "
                f"may carry is epoch {MAX_EPOCH}, sequence {MAX_SEQUENCE} (nothing could follow it)",
                epoch=epoch, sequence=sequence, max_epoch=MAX_EPOCH, max_sequence=MAX_SEQUENCE)
        if floor > sequence:
            raise FloorAboveSequence(
                f"Hello of node {hello.node_id!r} claims history floor {floor} above its sequence {sequence}; the "
                "floor is at most the sequence (the first held delta - 1, or the sequence when none is held)",
                history_floor=floor, sequence=sequence)
        node = self._nodes.get(hello.node_id)
        if node is not None and node.has_replica and epoch < node.epoch:
            raise EpochBehindReplica(
                f"node {hello.node_id!r} says it is at epoch {epoch}, but this coordinator's replica of it is at "
                f"epoch {node.epoch}: a node never goes back to an epoch it left (did it lose its persisted "
                f"epoch?). Start it so it takes an epoch above {node.epoch}, or unlist it to start over",
                epoch=epoch, replica_epoch=node.epoch)

    @staticmethod
    def _refuse_delta_position(node: _Node, d: filter_pb2.Delta) -> None:
        """Raise for a delta that cannot follow the replica (state unchanged)."""
        epoch, sequence = int(d.epoch), int(d.sequence)
        if epoch > MAX_EPOCH or not 1 <= sequence <= MAX_SEQUENCE:
            raise PositionOutOfRange(
                f"delta of node {node.node_id!r} at epoch {epoch}, sequence {sequence}: a delta carries an epoch of "
                f"at most {MAX_EPOCH} and a sequence from 1 to {MAX_SEQUENCE} (sequence 0 is an epoch's baseline)",
                epoch=epoch, sequence=sequence, max_epoch=MAX_EPOCH, max_sequence=MAX_SEQUENCE)
        if node.has_replica and epoch < node.epoch:
            raise EpochBehindReplica(
                f"delta {sequence} of node {node.node_id!r} is of epoch {epoch}, older than the replica's epoch "
                f"{node.epoch}: the node's stream never goes back to an epoch it left",
                epoch=epoch, replica_epoch=node.epoch)

    @staticmethod
    def _snapshot_refusal(node: _Node, c: filter_pb2.SnapshotChunk) -> str:
        """Why the snapshot starting with chunk `c` cannot follow the replica ('' when it can);
        the reason goes out in a SnapshotRejected."""
        epoch, sequence = int(c.epoch), int(c.sequence)
        if epoch > MAX_EPOCH or sequence > MAX_SEQUENCE:
            return (f"snapshot {c.snapshot_id} at epoch {epoch}, sequence {sequence}: the largest a position may "
                    f"carry is epoch {MAX_EPOCH}, sequence {MAX_SEQUENCE} (nothing could follow it)")
        if node.has_replica and epoch < node.epoch:
            return (f"snapshot {c.snapshot_id} at epoch {epoch}, sequence {sequence} is of an epoch older than the "
                    f"replica's epoch {node.epoch}: installing it would roll the replica back")
        hello_epoch, hello_sequence = node.hello_position
        if (epoch, sequence) < (hello_epoch, hello_sequence):
            return (f"snapshot {c.snapshot_id} at epoch {epoch}, sequence {sequence} precedes epoch {hello_epoch}, "
                    f"sequence {hello_sequence} that the node announced in its Hello on this stream: a node cuts "
                    "snapshots at its current position, which never goes back")
        return ""

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

    def _need(self, node: _Node, reason: int, detail: str, now: float, out: _Outcome) -> None:
        """NeedSnapshot, at most once per need_snapshot_retry_s while one is outstanding."""
        if node.awaiting is not None and now - node.need_sent_at < self.config.need_snapshot_retry_s:
            return
        if node.assembly is not None and now - node.assembly.last_chunk_at < self.config.need_snapshot_retry_s:
            return   # a snapshot is arriving; it will answer this
        node.awaiting = reason
        node.need_sent_at = now
        name = reason_name(reason)
        node.counters.need_snapshot[name] = node.counters.need_snapshot.get(name, 0) + 1
        out.replies.append(sync_pb2.CoordinatorMessage(
            node_id=node.node_id,
            need_snapshot=sync_pb2.NeedSnapshot(
                reason=reason, have_epoch=node.epoch if node.has_replica else 0,
                have_sequence=node.sequence if node.has_replica else 0, detail=detail)))
        out.events.append(ResyncRequested(node.node_id, name, detail))

    def _on_delta(self, node: _Node, d: filter_pb2.Delta, now: float, out: _Outcome) -> None:
        if not node.has_replica:
            return self._need(node, REASON_NO_REPLICA, "no replica to apply deltas to", now, out)
        if d.epoch != node.epoch:   # a newer epoch (an older one was refused before this)
            return self._need(node, REASON_UNKNOWN_EPOCH, f"delta of epoch {d.epoch}, replica at epoch {node.epoch}",
                              now, out)
        if node.replica_foreign:
            return self._need(node, REASON_UNKNOWN_EPOCH, "replica is not from the node's current history", now, out)
        if d.sequence <= node.sequence:
            node.counters.duplicates += 1
            out.replies.append(self._ack(node))
            return None
        if d.sequence > node.sequence + 1:
            return self._need(node, REASON_GAP, f"delta {d.sequence} after {node.sequence}", now, out)
        assert node.geometry is not None
        try:
            changes = decode_delta(d.payload, node.geometry.bits, max_positions=self.config.max_delta_positions)
        except CodecError as exc:
            return self._need(node, REASON_BAD_PAYLOAD, f"delta {d.sequence}: {exc}", now, out)
        expected = changes.checksum_after(node.checksum)
        if expected != d.checksum:
            return self._need(node, REASON_CHECKSUM_MISMATCH,
                              f"delta {d.sequence} leads to checksum {expected:#x}, node says {d.checksum:#x}",
                              now, out)
        try:
            self.sink.apply(node.node_id, changes)
        except FilterDivergedError as exc:
            return self._need(node, REASON_CHECKSUM_MISMATCH,
                              f"delta {d.sequence} does not fit the replica: {exc}", now, out)
        node.sequence = d.sequence
        node.checksum = d.checksum
        node.key_count = int(d.key_count)
        node.last_applied_at = now
        node.awaiting = None
        node.counters.deltas_applied += 1
        node.counters.delta_bytes += len(d.payload)
        out.replies.append(self._ack(node))
        out.events.append(ReplicaAdvanced(node.node_id, node.epoch, node.sequence))
        return None

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

    def _already_have(self, node: _Node, c: filter_pb2.SnapshotChunk, out: _Outcome) -> None:
        """Replies to a snapshot that is not newer than the replica: confirm where we are."""
        if c.purpose == PURPOSE_REBUILD and c.epoch == node.epoch:
            out.replies.append(sync_pb2.CoordinatorMessage(
                node_id=node.node_id,
                snapshot_verified=sync_pb2.SnapshotVerified(snapshot_id=c.snapshot_id, epoch=node.epoch,
                                                            sequence=node.sequence)))
        out.replies.append(self._ack(node))

    def _reject(self, node: _Node, snapshot_id: int, detail: str, out: _Outcome) -> None:
        node.assembly = None
        node.last_snapshot_id = max(node.last_snapshot_id, snapshot_id)
        node.counters.snapshots_rejected += 1
        out.replies.append(sync_pb2.CoordinatorMessage(
            node_id=node.node_id, snapshot_rejected=sync_pb2.SnapshotRejected(snapshot_id=snapshot_id, detail=detail)))
        out.events.append(SnapshotRejected(node.node_id, snapshot_id, detail))

    def _on_chunk(self, node: _Node, c: filter_pb2.SnapshotChunk, now: float, out: _Outcome) -> None:
        asm = node.assembly
        if asm is None or c.snapshot_id != asm.snapshot_id:
            if c.snapshot_id <= node.last_snapshot_id or (asm is not None and c.snapshot_id < asm.snapshot_id):
                return None   # a late chunk of an attempt already settled or superseded
            refusal = self._snapshot_refusal(node, c)
            if refusal:
                return self._reject(node, c.snapshot_id, refusal, out)
            if self._replica_holds(node, int(c.epoch), int(c.sequence), int(c.checksum)):
                node.last_snapshot_id = c.snapshot_id
                return self._already_have(node, c, out)
            if not c.HasField("geometry"):
                return self._reject(node, c.snapshot_id, "snapshot chunk has no geometry", out)
            try:
                geometry = Geometry.from_proto(c.geometry)
                assembler = SnapshotAssembler(geometry, encoding=int(c.encoding), chunk_count=int(c.chunk_count),
                                              total_bytes=int(c.total_bytes), checksum=int(c.checksum),
                                              max_total_bytes=self.config.max_snapshot_bytes)
            except (GeometryError, SnapshotError) as exc:
                return self._reject(node, c.snapshot_id, f"snapshot {c.snapshot_id}: {exc}", out)
            asm = node.assembly = _Assembly(
                snapshot_id=c.snapshot_id, epoch=int(c.epoch), sequence=int(c.sequence), purpose=int(c.purpose),
                checksum=int(c.checksum), key_count=int(c.key_count), capacity=int(c.capacity),
                assembler=assembler, last_chunk_at=now)
        if (c.epoch, c.sequence, c.checksum, c.chunk_count, c.total_bytes) != (
                asm.epoch, asm.sequence, asm.checksum, asm.assembler.chunk_count, asm.assembler.total_bytes):
            return self._reject(node, c.snapshot_id, f"chunk {c.chunk_index} of snapshot {c.snapshot_id} "
                                                     "disagrees with its first chunk's header", out)
        try:
            asm.assembler.add(int(c.chunk_index), c.data)
        except SnapshotError as exc:
            return self._reject(node, c.snapshot_id, f"snapshot {c.snapshot_id}: {exc}", out)
        asm.last_chunk_at = now
        if not asm.assembler.complete:
            return None
        if self._replica_holds(node, asm.epoch, asm.sequence, asm.checksum):
            # deltas moved the replica past this snapshot while it assembled: installing it
            # would take back changes already applied (and keys already routable)
            node.assembly = None
            node.last_snapshot_id = asm.snapshot_id
            return self._already_have(node, c, out)
        if self.config.install_off_call:
            out.install = SnapshotInstall(node.node_id, asm)
            return None
        try:
            bloom = asm.assembler.finish()
        except SnapshotError as exc:
            return self._reject(node, c.snapshot_id, f"snapshot {c.snapshot_id}: {exc}", out)
        self.sink.install(node.node_id, bloom)
        self._installed(node, asm, bloom, now, out)
        return None

    def run_install(self, job: SnapshotInstall) -> None:
        """Decode a job's snapshot into a verified filter and install it in the sink. Touches only
        the job and the sink, so it may run in a worker thread."""
        try:
            job.bloom = job.assembly.assembler.finish()
        except SnapshotError as exc:
            job.error = f"snapshot {job.assembly.snapshot_id}: {exc}"
            return
        self.sink.install(job.node_id, job.bloom)

    def finish_install(self, job: SnapshotInstall, now: float) -> SyncResult:
        """The state commit of a job `run_install` ran: the replica now is the snapshot (or the
        snapshot is rejected, if it did not decode)."""
        node = self._nodes.get(job.node_id)
        if node is None:    # unlisted meanwhile: the sink must not keep what run_install put there
            if job.bloom is not None:
                self.sink.remove(job.node_id)
            return NOTHING
        out = _Outcome()
        if job.bloom is None:
            self._reject(node, job.assembly.snapshot_id, job.error, out)
        else:
            self._installed(node, job.assembly, job.bloom, now, out)
        self._note(node)
        return out.result()

    def _installed(self, node: _Node, asm: _Assembly, bloom: BloomFilter, now: float, out: _Outcome) -> None:
        """The sink holds the snapshot's filter: the replica's position is the snapshot's."""
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
        rebuild = asm.purpose == PURPOSE_REBUILD
        if rebuild:
            node.rebuild = dataclasses.replace(node.rebuild, phase="switched", epoch=asm.epoch, progress=1.0,
                                               switched_at=now)
            out.replies.append(sync_pb2.CoordinatorMessage(
                node_id=node.node_id,
                snapshot_verified=sync_pb2.SnapshotVerified(snapshot_id=asm.snapshot_id, epoch=asm.epoch,
                                                            sequence=asm.sequence)))
        out.replies.append(self._ack(node))
        out.events.append(ReplicaInstalled(node.node_id, asm.epoch, asm.sequence, bloom.geometry, rebuild))
        return None

    def _on_heartbeat(self, node: _Node, stats: sync_pb2.NodeStats, now: float, out: _Outcome) -> None:
        stored = sync_pb2.NodeStats()
        stored.CopyFrom(stats)
        node.stats = stored
        if stats.rebuild_phase:
            node.rebuild = dataclasses.replace(node.rebuild, phase=stats.rebuild_phase,
                                               epoch=int(stats.rebuild_epoch),
                                               progress=float(stats.rebuild_progress))
        out.events.append(StatsReported(node.node_id, stored))
        if not node.has_replica:
            self._need(node, REASON_NO_REPLICA, "no replica of this node", now, out)
        elif node.awaiting is not None:
            self._need(node, node.awaiting, "still waiting for a snapshot", now, out)
        else:
            # always answer: a position report lets the node resend what we lack, and answers a
            # Hello whose reply was lost
            out.replies.append(self._ack(node))
