"""Node end of the sync protocol: a plain object, no sockets, threads, clocks or files.

The node daemon owns one `NodeSync`, calls it under its own lock (the object is not
thread-safe) and moves its messages over one gRPC stream per coordinator ("peer"):

    sync = NodeSync(node_id, storage_address, counting_filter, epoch=persisted_epoch,
                    capacity=..., target_fpr=..., key_count=store_count)
    # on every write/delete (same critical section as the store write):
    filter.add(key); ack = sync.pending_sequence        # WriteAck(epoch, sequence)
    # every push interval (or when the size threshold is reached):
    sync.cut(now, key_count=store_count)
    for peer in connected: send(sync.outgoing(peer, now))
    # stream opened / message in / stream ended:
    send(sync.connect(peer, now)); send(sync.receive(peer, msg, now)); sync.disconnect(peer)
    # after every call: for event in sync.take_events(): ...  (rebuild requests, retirements)

`now` is a float in seconds from any monotonic clock; the object only compares it.

Why the state looks like this (docs/sync-protocol.md has the full argument):
- One change stream per epoch: `cut()` turns the filter's change set into the next
  sequence, encodes it once and keeps it in a bounded history (by bytes and count).
- One cursor per peer (`_Peer`): what it acknowledged and what was sent to it, so a slow
  coordinator never holds back a fast one; a peer that falls below the history floor
  gets a snapshot instead of the trimmed deltas.
- A snapshot is the state at exactly one sequence: it is cut first, then the filter copied.
- Rebuild hand-over: during it two epochs are live (the old filter and the new one, both
  dual-written by the daemon). Per peer, old-epoch deltas flow until that peer's rebuild
  snapshot is cut, then only the snapshot and the new epoch's deltas after it. Old deltas
  cut *after* the snapshot are never sent to that peer: a coordinator that applied them
  and then installed the (older) snapshot would lose keys added in between.
"""

from __future__ import annotations

import itertools
from collections import deque
from dataclasses import dataclass, field

from shardsieve import codec
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import Geometry, GeometryError
from shardsieve.snapshot import MAX_CHUNK_BYTES, EncodedSnapshot, encode_snapshot
from shardsieve.sync.errors import (
    GeometryMismatch,
    MalformedMessage,
    ProtocolViolation,
    RebuildStateError,
    SequenceAhead,
    UnknownEpoch,
    UnknownPeer,
    WrongNodeId,
)
from shardsieve.v1 import filter_pb2, sync_pb2

PROTOCOL_VERSION = 1

PURPOSE_RESYNC = filter_pb2.SNAPSHOT_PURPOSE_RESYNC
PURPOSE_REBUILD = filter_pb2.SNAPSHOT_PURPOSE_REBUILD

PHASE_IDLE = ""
PHASE_SCANNING = "scanning"
PHASE_STREAMING = "streaming"
PHASE_AWAITING_VERIFY = "awaiting-verify"


class SnapshotRefused(ProtocolViolation):
    """A coordinator rejected our snapshots more often than allowed; reset its stream."""


# --------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class NodeSyncConfig:
    """Limits of the node end. Defaults suit a 2^20..2^24-bit filter on a LAN."""

    push_interval_ms: int = 50              # advertised in the Hello; the daemon's timer uses it
    max_history_bytes: int = 8 << 20         # encoded delta bytes kept per epoch for lagging peers
    max_history_deltas: int = 4096           # deltas kept per epoch
    max_in_flight_bytes: int = 4 << 20       # per peer: bytes sent but not acknowledged
    retransmit_after_s: float = 5.0          # no ack progress for this long -> resend from the ack
    max_chunk_bytes: int = MAX_CHUNK_BYTES   # snapshot chunk size
    max_rebuild_attempts: int = 3            # rejected rebuild snapshots per peer before giving up
    max_resync_rejections: int = 5           # rejected resync snapshots per stream before a reset

    def __post_init__(self) -> None:
        for name in ("push_interval_ms", "max_history_bytes", "max_history_deltas", "max_in_flight_bytes",
                     "max_chunk_bytes", "max_rebuild_attempts", "max_resync_rejections"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"NodeSyncConfig.{name} must be a positive integer, got {value!r}")
        if not self.retransmit_after_s > 0:
            raise ValueError(f"NodeSyncConfig.retransmit_after_s must be > 0, got {self.retransmit_after_s!r}")
        if self.max_chunk_bytes > MAX_CHUNK_BYTES:
            raise ValueError(f"NodeSyncConfig.max_chunk_bytes must be at most {MAX_CHUNK_BYTES}")


# --------------------------------------------------------------------------- events for the daemon


@dataclass(frozen=True)
class RebuildRequested:
    """A coordinator asked for a rebuild; the daemon should scan its store into a new
    CountingBloomFilter at geometry_for(capacity, target_fpr) (dual-writing meanwhile),
    calling start_rebuild / report_scan_progress / begin_epoch (or abandon_rebuild)."""

    peer: str
    request: sync_pb2.RebuildRequest


@dataclass(frozen=True)
class PeerSwitched:
    """A coordinator verified the new epoch's snapshot and routes with it."""

    peer: str
    epoch: int


@dataclass(frozen=True)
class OldFilterRetired:
    """Every connected coordinator switched: stop dual-writing, drop the old filter."""

    old_epoch: int
    new_epoch: int


@dataclass(frozen=True)
class RebuildAbandoned:
    """The rebuild ended without a switch; the old filter stays current. Drop the new one
    and stop dual-writing."""

    epoch: int
    reason: str


@dataclass(frozen=True)
class SnapshotStarted:
    """A snapshot was cut for a peer (for logs and stats)."""

    peer: str
    epoch: int
    sequence: int
    purpose: int
    reason: str
    encoded_bytes: int


NodeEvent = RebuildRequested | PeerSwitched | OldFilterRetired | RebuildAbandoned | SnapshotStarted


@dataclass(frozen=True)
class PeerStatus:
    """Read-only view of one peer's cursor, for stats and tests."""

    peer: str
    answered: bool
    stream_epoch: int | None
    acked: int
    sent: int
    in_flight_bytes: int
    snapshot_in_progress: bool
    switched: bool
    bytes_sent: int


# --------------------------------------------------------------------------- internal state


@dataclass
class _Entry:
    sequence: int
    message: sync_pb2.NodeMessage   # shared by every peer; never mutated after creation
    nbytes: int


class _History:
    """The deltas of one epoch still held, oldest first, bounded by bytes and count."""

    def __init__(self, max_bytes: int, max_count: int) -> None:
        self.entries: deque[_Entry] = deque()
        self.bytes = 0
        self.max_bytes = max_bytes
        self.max_count = max_count

    def append(self, entry: _Entry) -> None:
        self.entries.append(entry)
        self.bytes += entry.nbytes
        while self.entries and (self.bytes > self.max_bytes or len(self.entries) > self.max_count):
            old = self.entries.popleft()
            self.bytes -= old.nbytes

    def floor(self, current_sequence: int) -> int:
        """Lowest replica sequence the held deltas can bring up to current_sequence."""
        return self.entries[0].sequence - 1 if self.entries else current_sequence

    def get(self, sequence: int) -> _Entry:
        first = self.entries[0].sequence
        entry = self.entries[sequence - first]
        assert entry.sequence == sequence
        return entry


class _EpochStream:
    """One epoch's filter and change stream."""

    def __init__(self, epoch: int, filter_: CountingBloomFilter, capacity: int, target_fpr: float,
                 config: NodeSyncConfig) -> None:
        self.epoch = epoch
        self.filter = filter_
        self.geometry: Geometry = filter_.geometry
        self.geometry_proto = filter_.geometry.to_proto()
        self.capacity = capacity
        self.target_fpr = target_fpr
        filter_.take_changes()          # baseline: the state now is sequence 0 of this epoch
        self.sequence = 0
        self.checksum = filter_.checksum
        self.history = _History(config.max_history_bytes, config.max_history_deltas)

    @property
    def floor(self) -> int:
        return self.history.floor(self.sequence)

    def cut(self, key_count: int) -> filter_pb2.Delta | None:
        changes = self.filter.take_changes()
        if changes.is_empty:
            return None
        self.sequence += 1
        self.checksum = self.filter.checksum
        delta = filter_pb2.Delta(epoch=self.epoch, sequence=self.sequence,
                                 payload=codec.encode_delta(changes, self.geometry.bits),
                                 checksum=self.checksum, key_count=key_count)
        message = sync_pb2.NodeMessage(delta=delta)
        self.history.append(_Entry(self.sequence, message, message.ByteSize()))
        return delta


@dataclass
class _OutgoingSnapshot:
    snapshot_id: int
    epoch: int
    sequence: int
    purpose: int
    reason: str
    messages: list[sync_pb2.NodeMessage]
    sizes: list[int]
    next_index: int = 0
    finished_at: float | None = None       # when the last chunk left
    # REBUILD only: old-epoch deltas up to this sequence go out before the first chunk,
    # and what to restore when the coordinator rejects the snapshot.
    old_epoch: int | None = None
    old_until: int = 0
    restore_epoch: int | None = None
    restore_acked: int = -1

    @property
    def all_sent(self) -> bool:
        return self.next_index >= len(self.messages)


@dataclass
class _Peer:
    name: str
    connected_at: float
    answered: bool = False                  # the coordinator replied to our Hello
    stream_epoch: int | None = None         # epoch whose deltas this peer follows
    acked: int = -1                         # highest sequence of stream_epoch it acknowledged
    sent: int = -1                          # highest sequence of stream_epoch sent on this stream
    last_progress_at: float = 0.0
    in_flight: deque[tuple[int, int]] = field(default_factory=deque)   # (sequence, bytes) unacked
    in_flight_bytes: int = 0
    snapshot: _OutgoingSnapshot | None = None
    wanted: tuple[int, str] | None = None   # (purpose, reason) of a snapshot to cut
    switched: bool = False                  # verified the current epoch during a hand-over
    rebuild_rejections: int = 0
    resync_rejections: int = 0
    bytes_sent: int = 0


# --------------------------------------------------------------------------- the protocol object


class NodeSync:
    """The node end of FilterSync for every coordinator this node talks to."""

    def __init__(self, node_id: str, storage_address: str, filter_: CountingBloomFilter, *,
                 epoch: int, capacity: int, target_fpr: float, key_count: int = 0,
                 config: NodeSyncConfig | None = None) -> None:
        """`filter_` holds the node's keys now (built from the store); its pending changes
        become this epoch's baseline (sequence 0). `epoch` must be larger than any epoch this
        node id used before (persist it and add one on every start): a coordinator holding a
        replica of an earlier incarnation then resyncs instead of applying deltas to it."""
        if not node_id:
            raise ValueError("node_id must be a non-empty string")
        if isinstance(epoch, bool) or not isinstance(epoch, int) or epoch < 0:
            raise ValueError(f"epoch must be a non-negative integer, got {epoch!r}")
        self.node_id = node_id
        self.storage_address = storage_address
        self.config = config or NodeSyncConfig()
        self.key_count = int(key_count)
        self._stream = _EpochStream(epoch, filter_, capacity, target_fpr, self.config)
        self._old: _EpochStream | None = None       # live only during a rebuild hand-over
        self._highest_epoch = epoch
        self._peers: dict[str, _Peer] = {}
        self._events: list[NodeEvent] = []
        self._snapshot_ids = itertools.count(1)
        self._snapshot_cache: tuple[int, int, EncodedSnapshot, int] | None = None
        self._rebuild_phase = PHASE_IDLE
        self._scan_fraction = 0.0
        self._rebuild_request: tuple[int, float] | None = None   # (capacity, target_fpr) being built
        self._pending_rebuild: sync_pb2.RebuildRequest | None = None
        self.bytes_pushed = 0

    # ------------------------------------------------------------------ read-only state
    @property
    def epoch(self) -> int:
        """The current epoch: the one new writes are sequenced in and Hellos advertise."""
        return self._stream.epoch

    @property
    def highest_epoch(self) -> int:
        """The largest epoch number used so far (abandoned rebuilds burn one). Persist it:
        after a restart the daemon passes highest_epoch + 1 as the new epoch."""
        return max(self._highest_epoch, self._stream.epoch)

    @property
    def sequence(self) -> int:
        """The last sequence cut in the current epoch."""
        return self._stream.sequence

    @property
    def checksum(self) -> int:
        """The current filter's checksum at the last cut."""
        return self._stream.checksum

    @property
    def geometry(self) -> Geometry:
        return self._stream.geometry

    @property
    def capacity(self) -> int:
        return self._stream.capacity

    @property
    def target_fpr(self) -> float:
        return self._stream.target_fpr

    @property
    def filter(self) -> CountingBloomFilter:
        """The current filter (the new one once begin_epoch ran)."""
        return self._stream.filter

    @property
    def old_filter(self) -> CountingBloomFilter | None:
        """The previous filter while a hand-over runs (still dual-written), else None."""
        return self._old.filter if self._old else None

    @property
    def dual_write(self) -> bool:
        """True from start_rebuild until OldFilterRetired / RebuildAbandoned: writes go to both filters."""
        return self._rebuild_phase != PHASE_IDLE

    @property
    def pending_sequence(self) -> tuple[int, int]:
        """(epoch, sequence) that the next cut will produce: what a WriteAck reports. A
        coordinator that applied this point (compared as a tuple) holds the write. During a
        hand-over this names the new epoch, which is conservative: a coordinator still on the
        old epoch keeps its read-your-writes hint until it switched and caught up."""
        return self._stream.epoch, self._stream.sequence + 1

    @property
    def live_positions(self) -> list[tuple[int, int]]:
        """(epoch, last sequence cut) of every live epoch: one, or two (old first) during a
        hand-over. A write made now is in every state at or after (epoch, sequence + 1) of each."""
        return [(s.epoch, s.sequence) for s in (self._old, self._stream) if s is not None]

    @property
    def old_cut(self) -> tuple[int, int, int] | None:
        """(epoch, last sequence cut, checksum at that cut) of the previous epoch while a
        hand-over runs, else None: lets the daemon tell whether a write is already in the old
        epoch's last cut state or waits for its next one (WriteAck.old_position)."""
        return (self._old.epoch, self._old.sequence, self._old.checksum) if self._old is not None else None

    @property
    def history_floor(self) -> int:
        """Lowest replica sequence of the current epoch that deltas can still catch up."""
        return self._stream.floor

    @property
    def rebuild_phase(self) -> str:
        """"" (idle), "scanning", "streaming" or "awaiting-verify"."""
        return self._rebuild_phase

    @property
    def rebuild_epoch(self) -> int:
        """The epoch being handed over to (0 when idle or still scanning)."""
        return self._stream.epoch if self._old is not None else 0

    @property
    def rebuild_progress(self) -> float:
        """0..1: the scan is the first half, peers switched the second half."""
        if self._rebuild_phase == PHASE_IDLE:
            return 0.0
        if self._rebuild_phase == PHASE_SCANNING:
            return 0.5 * self._scan_fraction
        peers = [p for p in self._peers.values()]
        if not peers:
            return 1.0
        return 0.5 + 0.5 * sum(p.switched for p in peers) / len(peers)

    @property
    def peers(self) -> list[str]:
        return list(self._peers)

    def peer_status(self, peer: str) -> PeerStatus:
        p = self._peer(peer)
        return PeerStatus(peer=p.name, answered=p.answered, stream_epoch=p.stream_epoch, acked=p.acked,
                          sent=p.sent, in_flight_bytes=p.in_flight_bytes,
                          snapshot_in_progress=p.snapshot is not None, switched=p.switched,
                          bytes_sent=p.bytes_sent)

    def take_events(self) -> list[NodeEvent]:
        """Events since the last call, oldest first (rebuild requests, switches, retirements)."""
        events, self._events = self._events, []
        return events

    # ------------------------------------------------------------------ the change stream
    def cut(self, now: float, key_count: int | None = None) -> list[filter_pb2.Delta]:
        """Turn the pending filter changes into the next delta of each live epoch.

        Returns the deltas cut (none when nothing changed; two during a hand-over, old epoch
        first). They are kept in the history; `outgoing` sends them to each peer.
        """
        if key_count is not None:
            self.key_count = int(key_count)
        out: list[filter_pb2.Delta] = []
        for stream in (self._old, self._stream):
            if stream is not None:
                delta = stream.cut(self.key_count)
                if delta is not None:
                    out.append(delta)
        return out

    # ------------------------------------------------------------------ per-peer stream
    def connect(self, peer: str, now: float) -> list[sync_pb2.NodeMessage]:
        """A stream to `peer` opened (or re-opened): forget its old cursor, return the Hello."""
        self._peers[peer] = _Peer(name=peer, connected_at=now, last_progress_at=now)
        s = self._stream
        hello = sync_pb2.Hello(
            node_id=self.node_id, storage_address=self.storage_address, geometry=s.geometry_proto,
            epoch=s.epoch, sequence=s.sequence, checksum=s.checksum, key_count=self.key_count,
            capacity=s.capacity, target_fpr=s.target_fpr, push_interval_ms=self.config.push_interval_ms,
            protocol_version=PROTOCOL_VERSION, history_floor=s.floor)
        return [sync_pb2.NodeMessage(hello=hello)]

    def disconnect(self, peer: str) -> None:
        """The stream to `peer` ended; its cursor is dropped (the next connect starts over)."""
        if self._peers.pop(peer, None) is not None:
            self._maybe_retire()

    def receive(self, peer: str, msg: sync_pb2.CoordinatorMessage, now: float) -> list[sync_pb2.NodeMessage]:
        """Handle one coordinator message. Raises a ProtocolViolation (state unchanged) for a
        message naming another node id, a future epoch, another geometry or an unproduced
        sequence; the driver then resets the stream. Returns messages to send at once
        (currently none: everything goes out through `outgoing`)."""
        p = self._peer(peer)
        if msg.node_id and msg.node_id != self.node_id:
            raise WrongNodeId(f"coordinator message for node id {msg.node_id!r}, this node is {self.node_id!r}")
        kind = msg.WhichOneof("body")
        if kind == "ack":
            self._check_point(msg.ack.epoch, msg.ack.sequence, msg.ack.geometry if msg.ack.HasField("geometry") else None)
            p.answered = True
            self._on_ack(p, msg.ack.epoch, msg.ack.sequence, now)
        elif kind == "need_snapshot":
            ns = msg.need_snapshot
            p.answered = True
            self._on_need_snapshot(p, ns, now)
        elif kind == "rebuild":
            self._on_rebuild_request(p, msg.rebuild)
        elif kind == "snapshot_verified":
            sv = msg.snapshot_verified
            self._check_point(sv.epoch, sv.sequence, None)
            p.answered = True
            self._on_ack(p, sv.epoch, sv.sequence, now, verified_id=sv.snapshot_id)
        elif kind == "snapshot_rejected":
            self._on_rejected(p, msg.snapshot_rejected, now)
        else:
            raise MalformedMessage("coordinator message has no body")
        self._maybe_retire()
        return []

    def outgoing(self, peer: str, now: float, max_bytes: int = 4 << 20) -> list[sync_pb2.NodeMessage]:
        """Messages for `peer` now: pending snapshot chunks, then deltas after its cursor,
        up to about max_bytes (at least one message if any is due) and within its in-flight
        window. Resends from the last ack when nothing was acknowledged for
        retransmit_after_s. Empty until the coordinator answered the Hello."""
        p = self._peer(peer)
        if not p.answered:
            return []
        self._check_timeouts(p, now)
        out: list[sync_pb2.NodeMessage] = []
        used = 0
        while used < max_bytes:
            item = self._next_message(p, now, max_bytes - used, first=not out)
            if item is None:
                break
            message, size = item
            out.append(message)
            used += size
        p.bytes_sent += used
        self.bytes_pushed += used
        return out

    def heartbeat(self, stats: sync_pb2.NodeStats | None = None) -> sync_pb2.NodeMessage:
        """A Heartbeat carrying `stats` (the daemon's counters) with the sync-owned fields
        (epoch, sequence, geometry, capacity, target FPR, fill, predicted FPR, rebuild
        progress, bytes pushed) filled in here."""
        out = sync_pb2.NodeStats()
        if stats is not None:
            out.CopyFrom(stats)
        s = self._stream
        out.key_count = self.key_count if not out.key_count else out.key_count
        out.capacity = s.capacity
        out.geometry.CopyFrom(s.geometry_proto)
        out.epoch = s.epoch
        out.sequence = s.sequence
        out.target_fpr = s.target_fpr
        out.fill = s.filter.fill()
        out.predicted_fpr = s.filter.predicted_fpr()
        out.bytes_pushed = self.bytes_pushed
        out.rebuild_epoch = self.rebuild_epoch
        out.rebuild_progress = self.rebuild_progress
        out.rebuild_phase = self.rebuild_phase
        return sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=out))

    # ------------------------------------------------------------------ rebuild (daemon-driven)
    def take_rebuild_request(self) -> sync_pb2.RebuildRequest | None:
        """The most recent RebuildRequest not yet taken (also reported as a RebuildRequested
        event; use whichever suits the daemon). start_rebuild clears it too."""
        request, self._pending_rebuild = self._pending_rebuild, None
        return request

    def start_rebuild(self, capacity: int, target_fpr: float, now: float) -> None:
        """The daemon started scanning into a new filter (dual writes from here on)."""
        if self._rebuild_phase != PHASE_IDLE:
            raise RebuildStateError(f"a rebuild is already running (phase {self._rebuild_phase!r})")
        self._rebuild_phase = PHASE_SCANNING
        self._scan_fraction = 0.0
        self._pending_rebuild = None
        self._rebuild_request = (int(capacity), float(target_fpr))

    def report_scan_progress(self, fraction: float) -> None:
        """Scan progress 0..1, for stats."""
        self._scan_fraction = min(1.0, max(0.0, float(fraction)))

    def begin_epoch(self, new_filter: CountingBloomFilter, capacity: int, target_fpr: float,
                    now: float) -> int:
        """The scan finished: `new_filter` holds every key (dual writes keep it so). Start
        epoch = highest so far + 1 with it as the current filter and hand it over: every
        peer gets a REBUILD snapshot; the old filter keeps streaming to peers until their
        snapshot is cut and is retired (OldFilterRetired) once all connected peers switched.
        Returns the new epoch."""
        if self._rebuild_phase not in (PHASE_IDLE, PHASE_SCANNING) or self._old is not None:
            raise RebuildStateError(f"begin_epoch during phase {self._rebuild_phase!r}")
        self.cut(now)   # the old epoch's last changes before the split point
        self._highest_epoch += 1
        self._old = self._stream
        self._stream = _EpochStream(self._highest_epoch, new_filter, capacity, target_fpr, self.config)
        self._rebuild_phase = PHASE_STREAMING
        self._scan_fraction = 1.0
        for p in self._peers.values():
            p.switched = False
            p.rebuild_rejections = 0
            if p.answered:
                p.wanted = (PURPOSE_REBUILD, "rebuild")
                if p.snapshot is not None and not p.snapshot.all_sent:
                    p.snapshot = None    # an unfinished old-epoch snapshot: superseded
        self._maybe_retire()
        return self._stream.epoch

    def abandon_rebuild(self, reason: str) -> None:
        """Give up the running rebuild (scan failed, or called internally after too many
        rejections). Only possible while no peer switched to the new epoch; the old filter
        stays current and the new epoch's number is never reused (RebuildAbandoned)."""
        if self._rebuild_phase == PHASE_IDLE:
            raise RebuildStateError("no rebuild is running")
        self._highest_epoch = max(self._highest_epoch, self._stream.epoch)
        if self._old is None:
            self._highest_epoch += 1   # burn the number the rebuild would have used
            self._rebuild_phase = PHASE_IDLE
            self._rebuild_request = None
            self._events.append(RebuildAbandoned(epoch=self._highest_epoch, reason=reason))
            return
        if any(p.switched for p in self._peers.values()):
            raise RebuildStateError("a coordinator already routes with the new epoch; it cannot be abandoned")
        new_epoch = self._stream.epoch
        self._stream, self._old = self._old, None
        for p in self._peers.values():
            snap = p.snapshot
            if snap is not None and snap.restore_epoch is not None:
                p.stream_epoch = snap.restore_epoch
                p.acked = p.sent = snap.restore_acked
                p.in_flight.clear()
                p.in_flight_bytes = 0
            p.snapshot = None
            if p.wanted is not None and p.wanted[0] == PURPOSE_REBUILD:
                p.wanted = None
            if p.stream_epoch == new_epoch:
                p.stream_epoch = None    # resync with the old (again current) filter
                p.wanted = (PURPOSE_RESYNC, "rebuild abandoned")
        self._rebuild_phase = PHASE_IDLE
        self._rebuild_request = None
        self._events.append(RebuildAbandoned(epoch=new_epoch, reason=reason))

    # ------------------------------------------------------------------ internals
    def _peer(self, peer: str) -> _Peer:
        try:
            return self._peers[peer]
        except KeyError:
            raise UnknownPeer(f"peer {peer!r} is not connected (call connect first)") from None

    def _live(self, epoch: int | None) -> _EpochStream | None:
        if epoch is None:
            return None
        if epoch == self._stream.epoch:
            return self._stream
        if self._old is not None and epoch == self._old.epoch:
            return self._old
        return None

    def _check_point(self, epoch: int, sequence: int, geometry: filter_pb2.Geometry | None) -> None:
        """Refuse a coordinator claim about a point of our stream that cannot exist."""
        if epoch > self._highest_epoch:
            raise UnknownEpoch(f"coordinator names epoch {epoch}; this node's newest epoch is {self._highest_epoch}")
        stream = self._live(epoch)
        if stream is None:
            return  # an epoch already retired: a late message, harmless
        if sequence > stream.sequence:
            raise SequenceAhead(
                f"coordinator claims sequence {sequence} of epoch {epoch}; the node has cut only {stream.sequence}")
        if geometry is not None:
            try:
                g = Geometry.from_proto(geometry)
            except GeometryError as exc:
                raise GeometryMismatch(f"coordinator sent an invalid geometry for epoch {epoch}: {exc}") from exc
            if g != stream.geometry:
                raise GeometryMismatch(f"coordinator names geometry ({g}) for epoch {epoch}; it is ({stream.geometry})")

    def _on_ack(self, p: _Peer, epoch: int, sequence: int, now: float, verified_id: int | None = None) -> None:
        """Ack and SnapshotVerified: the coordinator's replica is at (epoch, sequence)."""
        snap = p.snapshot
        if self._live(epoch) is None:
            if p.stream_epoch is not None and epoch > p.stream_epoch and snap is None and p.wanted is None:
                # the coordinator installed a rebuild we then abandoned: move it back by a snapshot
                p.wanted = (PURPOSE_RESYNC, f"coordinator follows abandoned epoch {epoch}")
            return  # otherwise an epoch already retired: a late message
        if snap is not None and epoch == snap.epoch and sequence >= snap.sequence and (
                snap.all_sent or verified_id == snap.snapshot_id):
            # the coordinator installed this snapshot (or holds a later state of its epoch)
            p.snapshot = None
            p.resync_rejections = 0
            self._adopt(p, epoch, sequence, now)
            return
        if p.stream_epoch == epoch:
            if sequence > p.acked:
                p.acked = sequence
                p.last_progress_at = now
                self._drop_in_flight(p, sequence)
            if p.sent < p.acked:
                p.sent = p.acked
            return
        if snap is not None:
            return  # a snapshot is on its way; it settles where this peer stands
        if p.stream_epoch is None or epoch > p.stream_epoch:
            # the answer to our Hello, or a position report after a lost confirmation
            self._adopt(p, epoch, sequence, now)

    def _adopt(self, p: _Peer, epoch: int, sequence: int, now: float) -> None:
        """Follow the coordinator's position (epoch, sequence) from here on."""
        p.stream_epoch = epoch
        p.acked = sequence
        p.sent = sequence
        p.in_flight.clear()
        p.in_flight_bytes = 0
        p.last_progress_at = now
        if self._old is not None and epoch == self._stream.epoch and not p.switched:
            p.switched = True
            p.rebuild_rejections = 0
            if p.wanted is not None and p.wanted[0] == PURPOSE_REBUILD:
                p.wanted = None
            self._events.append(PeerSwitched(peer=p.name, epoch=epoch))

    def _drop_in_flight(self, p: _Peer, sequence: int) -> None:
        while p.in_flight and p.in_flight[0][0] <= sequence:
            p.in_flight_bytes -= p.in_flight.popleft()[1]

    def _purpose_for(self, p: _Peer) -> int:
        return PURPOSE_REBUILD if self._old is not None and not p.switched else PURPOSE_RESYNC

    def _on_need_snapshot(self, p: _Peer, ns: sync_pb2.NeedSnapshot, now: float) -> None:
        snap = p.snapshot
        if snap is not None:
            if not snap.all_sent:
                return  # the snapshot being sent answers this request
            if ns.reason == sync_pb2.SNAPSHOT_REASON_NO_REPLICA or not (
                    ns.have_epoch == snap.epoch and ns.have_sequence >= snap.sequence):
                return  # asked before our snapshot arrived; the retransmit timer covers its loss
            p.snapshot = None  # it arrived, and a later problem needs a fresh one
        if p.wanted is None:
            p.wanted = (self._purpose_for(p), _reason_text(ns.reason))

    def _on_rebuild_request(self, p: _Peer, request: sync_pb2.RebuildRequest) -> None:
        if request.capacity < 1 or not 0.0 < request.target_fpr < 1.0:
            raise MalformedMessage(
                f"rebuild request needs capacity >= 1 and 0 < target_fpr < 1, got {request.capacity}, "
                f"{request.target_fpr}")
        if self._rebuild_phase != PHASE_IDLE:
            return  # one rebuild at a time; the coordinator sees the phase in heartbeats
        self._pending_rebuild = request
        self._events.append(RebuildRequested(peer=p.name, request=request))

    def _on_rejected(self, p: _Peer, rejected: sync_pb2.SnapshotRejected, now: float) -> None:
        snap = p.snapshot
        if snap is None or rejected.snapshot_id != snap.snapshot_id:
            return  # about an older attempt
        p.snapshot = None
        if snap.restore_epoch is not None:
            # the old replica stays where it was acknowledged; resend from there next time
            p.stream_epoch = snap.restore_epoch
            p.acked = snap.restore_acked
            p.sent = snap.restore_acked
            p.in_flight.clear()
            p.in_flight_bytes = 0
            p.last_progress_at = now
        if snap.purpose == PURPOSE_REBUILD and self._old is not None:
            p.rebuild_rejections += 1
            if p.rebuild_rejections >= self.config.max_rebuild_attempts:
                detail = (f"coordinator {p.name} rejected the rebuild snapshot {p.rebuild_rejections} times "
                          f"(last: {rejected.detail})")
                if not any(q.switched for q in self._peers.values()):
                    self.abandon_rebuild(detail)
                    return
                raise SnapshotRefused(detail)
            p.wanted = (PURPOSE_REBUILD, f"retry after rejection: {rejected.detail}")
            return
        p.resync_rejections += 1
        if p.resync_rejections >= self.config.max_resync_rejections:
            raise SnapshotRefused(f"coordinator {p.name} rejected {p.resync_rejections} snapshots "
                                  f"(last: {rejected.detail})")
        p.wanted = (self._purpose_for(p), f"retry after rejection: {rejected.detail}")

    def _check_timeouts(self, p: _Peer, now: float) -> None:
        rto = self.config.retransmit_after_s
        snap = p.snapshot
        if snap is not None and snap.all_sent:
            if snap.finished_at is not None and now - snap.finished_at >= rto:
                p.snapshot = None   # never confirmed: cut a fresh one (the old one may be trimmed)
                p.wanted = p.wanted or (self._purpose_for(p), "snapshot not acknowledged")
            return
        if p.sent > p.acked and now - p.last_progress_at >= rto:
            p.sent = p.acked          # go back: resend everything not acknowledged
            p.in_flight.clear()
            p.in_flight_bytes = 0
            p.last_progress_at = now

    def _next_message(self, p: _Peer, now: float, room: int, first: bool) -> tuple[sync_pb2.NodeMessage, int] | None:
        """The next message due for p, or None (nothing due, window full, or no room)."""
        for _ in range(3):
            if self._old is not None and not p.switched and p.snapshot is None and p.wanted is None:
                p.wanted = (PURPOSE_REBUILD, "rebuild")
            snap = p.snapshot
            if snap is None and p.wanted is not None:
                snap = self._start_snapshot(p, now)
            if snap is not None and not snap.all_sent:
                return self._next_chunk(p, snap, now, room, first)
            stream = self._live(p.stream_epoch)
            if stream is None:
                if snap is None:
                    p.wanted = (self._purpose_for(p), "following an epoch that ended")
                    continue
                return None
            if p.sent < stream.floor:
                if snap is None:
                    p.wanted = (self._purpose_for(p), "behind the history floor")
                    continue
                return None
            return self._delta(p, stream, now, room, first, stream.sequence)
        return None

    def _next_chunk(self, p: _Peer, snap: _OutgoingSnapshot, now: float, room: int,
                    first: bool) -> tuple[sync_pb2.NodeMessage, int] | None:
        # REBUILD: bring the old replica up to the split point first (never past it)
        old = self._old
        if (old is not None and snap.old_epoch == old.epoch and p.stream_epoch == old.epoch
                and p.sent < snap.old_until and p.sent >= old.floor):
            item = self._delta(p, old, now, room, first, snap.old_until)
            if item is not None:
                return item   # (a full window does not hold the snapshot back)
        size = snap.sizes[snap.next_index]
        if size > room and not first:
            return None
        message = snap.messages[snap.next_index]
        snap.next_index += 1
        if snap.all_sent:
            # pipeline: the deltas after the snapshot follow it on the same ordered stream
            snap.finished_at = now
            p.stream_epoch = snap.epoch
            p.sent = snap.sequence
            p.acked = -1
            p.in_flight.clear()
            p.in_flight_bytes = 0
            p.last_progress_at = now
            self._update_phase()
        return message, size

    def _delta(self, p: _Peer, stream: _EpochStream, now: float, room: int, first: bool,
               top: int) -> tuple[sync_pb2.NodeMessage, int] | None:
        if p.sent >= min(top, stream.sequence) or p.sent < stream.floor:
            return None
        if p.in_flight_bytes >= self.config.max_in_flight_bytes:
            return None
        entry = stream.history.get(p.sent + 1)
        if entry.nbytes > room and not first:
            return None
        if not p.in_flight:
            p.last_progress_at = now   # the retransmit clock runs from the oldest unacked send
        p.sent = entry.sequence
        p.in_flight.append((entry.sequence, entry.nbytes))
        p.in_flight_bytes += entry.nbytes
        return entry.message, entry.nbytes

    def _start_snapshot(self, p: _Peer, now: float) -> _OutgoingSnapshot:
        assert p.wanted is not None
        purpose, reason = p.wanted
        p.wanted = None
        if purpose == PURPOSE_REBUILD and (self._old is None or p.switched):
            purpose = PURPOSE_RESYNC
        self.cut(now)   # the snapshot describes exactly the state at the sequence just cut
        s = self._stream
        cache = self._snapshot_cache
        if cache is not None and cache[0] == s.epoch and cache[1] == s.sequence:
            encoded, checksum = cache[2], cache[3]
        else:
            bloom = s.filter.bloom()
            encoded = encode_snapshot(bloom, max_chunk_bytes=self.config.max_chunk_bytes)
            checksum = bloom.checksum
            self._snapshot_cache = (s.epoch, s.sequence, encoded, checksum)
        snapshot_id = next(self._snapshot_ids)
        messages = []
        sizes = []
        for index, data in enumerate(encoded.chunks):
            chunk = filter_pb2.SnapshotChunk(
                snapshot_id=snapshot_id, epoch=s.epoch, sequence=s.sequence, geometry=s.geometry_proto,
                encoding=encoded.encoding, purpose=purpose, chunk_index=index, chunk_count=len(encoded.chunks),
                total_bytes=encoded.total_bytes, data=data, checksum=checksum, key_count=self.key_count,
                capacity=s.capacity)
            message = sync_pb2.NodeMessage(snapshot_chunk=chunk)
            messages.append(message)
            sizes.append(message.ByteSize())
        snap = _OutgoingSnapshot(snapshot_id=snapshot_id, epoch=s.epoch, sequence=s.sequence, purpose=purpose,
                                 reason=reason, messages=messages, sizes=sizes)
        old = self._old
        if old is not None and p.stream_epoch == old.epoch:
            snap.old_epoch = old.epoch
            snap.old_until = old.sequence
            snap.restore_epoch = old.epoch
            snap.restore_acked = p.acked
        p.snapshot = snap
        self._update_phase()
        self._events.append(SnapshotStarted(peer=p.name, epoch=s.epoch, sequence=s.sequence, purpose=purpose,
                                            reason=reason, encoded_bytes=encoded.total_bytes))
        return snap

    def _update_phase(self) -> None:
        if self._old is None:
            return
        waiting = [p for p in self._peers.values() if not p.switched]
        if all(p.snapshot is not None and p.snapshot.all_sent for p in waiting):
            self._rebuild_phase = PHASE_AWAITING_VERIFY
        else:
            self._rebuild_phase = PHASE_STREAMING

    def _maybe_retire(self) -> None:
        if self._old is None:
            return
        if all(p.switched for p in self._peers.values()):
            old = self._old
            self._old = None
            self._rebuild_phase = PHASE_IDLE
            self._rebuild_request = None
            self._events.append(OldFilterRetired(old_epoch=old.epoch, new_epoch=self._stream.epoch))
            return
        self._update_phase()


def _reason_text(reason: int) -> str:
    try:
        return sync_pb2.SnapshotReason.Name(reason).removeprefix("SNAPSHOT_REASON_")
    except ValueError:
        return f"reason {reason}"
