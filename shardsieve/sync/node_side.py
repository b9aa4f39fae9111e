"""Node end of the sync protocol: a plain object, no sockets, threads, clocks or files.

`NodeSync` owns every counting filter of the node: the current one, the previous one while
a rebuild hands over, and the one a rebuild scan fills. It also owns the rule of which of
them a committed store change goes to, the change stream of each live epoch, one cursor
per coordinator ("peer") and the rebuild phase (docs/architecture.md#who-owns-which-state).
The daemon calls it under its own lock (the object is not thread-safe):

    sync = NodeSync(node_id, storage_address, loaded_filter, epoch=persisted_epoch + 1,
                    capacity=..., target_fpr=..., key_count=store_count)
    # inputs
    stamp = sync.record(added_keys, removed_keys)  # right after the store commit -> WriteAck
    sync.cut()                                     # every push interval, or when stamp.cut_due
    sync.connect(peer, now); sync.receive(peer, msg, now); sync.disconnect(peer)
    sync.heartbeat(peer, counters)
    sync.scan_batch(keys); sync.scan_done(now)     # a rebuild scan: the daemon reads the store
    # outputs of every input so far, in one batch, carried out in this order:
    ready = sync.ready(now, budgets)
    persist(ready.durable)      # 1. durable writes (before any message may name a new epoch)
    send(ready.messages)        # 2. per peer, in order
    run(ready.actions)          # 3. start a store scan, log lines
    sync.ack(ready)

`now` is a float in seconds from any monotonic clock; the object only compares and
subtracts it (docs/architecture.md#logic-without-io).

Why the state looks like this (docs/sync-protocol.md has the full argument):
- One change stream per epoch: `cut()` turns the filter's change set into the next
  sequence, encodes it once and keeps it in a bounded history (by bytes and count).
- One cursor per peer (`_Peer`): what it acknowledged and what was sent to it, so a slow
  coordinator never holds back a fast one; a peer that falls below the history floor
  gets a snapshot instead of the trimmed deltas.
- A snapshot is the state at exactly one sequence: it is cut first, then the filter copied.
- Rebuild: a scan fills a new filter in key order while writes go on. A write reaches the
  scan's filter only for keys the scan already passed (keys above the cursor are read by
  the scan itself; counting them twice would pin a counter, uncounting them first would
  underflow one). When the scan is done the new filter starts the next epoch and both
  epochs are live (both written). Per peer, old-epoch deltas flow until that peer's rebuild
  snapshot is cut, then only the snapshot and the new epoch's deltas after it. Old deltas
  cut *after* the snapshot are never sent to that peer: a coordinator that applied them
  and then installed the (older) snapshot would lose keys added in between
  (docs/architecture.md#1-no-false-negatives-once-synced).
- Positions only move forward: a coordinator refuses anything older than its replica
  (docs/sync-protocol.md, "Positions that cannot follow"), so a hand-over that is given up
  goes on under a fresh epoch rather than back to the old one.
"""

from __future__ import annotations

import itertools
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from enum import Enum, StrEnum
from types import MappingProxyType
from typing import Literal

import numpy as np

from shardsieve import codec, hashing
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import Geometry, GeometryError, geometry_for
from shardsieve.snapshot import MAX_CHUNK_BYTES, EncodedSnapshot, encode_snapshot
from shardsieve.sync.bounds import MAX_EPOCH
from shardsieve.sync.errors import (
    GeometryMismatch,
    MalformedMessage,
    ProtocolViolation,
    RebuildStateError,
    SequenceAhead,
    SyncError,
    UnknownEpoch,
    UnknownPeer,
    WrongNodeId,
)
from shardsieve.v1 import filter_pb2, sync_pb2

PROTOCOL_VERSION = 1

PURPOSE_RESYNC = filter_pb2.SNAPSHOT_PURPOSE_RESYNC
PURPOSE_REBUILD = filter_pb2.SNAPSHOT_PURPOSE_REBUILD

#: Bytes of deltas and snapshot chunks a driver lets one peer take per ready() while its
#: outbound queue has room (at least one message always fits).
SEND_BUDGET_BYTES = 4 << 20


class SnapshotRefused(ProtocolViolation):
    """A coordinator rejected our snapshots more often than allowed; reset its stream."""


class StaleReady(SyncError):
    """ack() was given a Ready other than the last one ready() returned (a driver bug)."""

    grpc_status_name = "INTERNAL"


# --------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class NodeSyncConfig:
    """Limits of the node end. Defaults suit a 2^20..2^24-bit filter on a LAN."""

    push_interval_ms: int = 50              # advertised in the Hello; the daemon's timer uses it
    cut_after_bits: int = 4096               # WriteStamp.cut_due once about this many bits changed
    max_history_bytes: int = 8 << 20         # encoded delta bytes kept per epoch for lagging peers
    max_history_deltas: int = 4096           # deltas kept per epoch
    max_in_flight_bytes: int = 4 << 20       # per peer: bytes sent but not acknowledged
    retransmit_after_s: float = 5.0          # no ack progress for this long -> resend from the ack
    max_chunk_bytes: int = MAX_CHUNK_BYTES   # snapshot chunk size
    max_rebuild_attempts: int = 3            # rejected rebuild snapshots per peer before giving up
    max_resync_rejections: int = 5           # rejected resync snapshots per stream before a reset

    def __post_init__(self) -> None:
        for name in ("push_interval_ms", "cut_after_bits", "max_history_bytes", "max_history_deltas",
                     "max_in_flight_bytes", "max_chunk_bytes", "max_rebuild_attempts", "max_resync_rejections"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"NodeSyncConfig.{name} must be a positive integer, got {value!r}")
        if not self.retransmit_after_s > 0:
            raise ValueError(f"NodeSyncConfig.retransmit_after_s must be > 0, got {self.retransmit_after_s!r}")
        if self.max_chunk_bytes > MAX_CHUNK_BYTES:
            raise ValueError(f"NodeSyncConfig.max_chunk_bytes must be at most {MAX_CHUNK_BYTES}")


# --------------------------------------------------------------------------- rebuild phases


class RebuildPhase(StrEnum):
    """Where a rebuild stands; the value is what heartbeats and Stats carry."""

    IDLE = ""
    SCANNING = "scanning"                 # the daemon scans its store into the new filter
    STREAMING = "streaming"               # new epoch begun; rebuild snapshots still to send
    AWAITING_VERIFY = "awaiting-verify"   # every snapshot sent, not every peer switched


class RebuildEvent(Enum):
    REQUESTED = "a rebuild request was accepted"
    SCAN_DONE = "the store scan reached the end of the store"
    SNAPSHOTS_SENT = "every peer still to switch has its rebuild snapshot sent"
    SNAPSHOT_OWED = "a peer still to switch needs a rebuild snapshot again"
    ALL_SWITCHED = "every connected peer verified the new epoch"
    ABANDONED = "the rebuild ended without a switch"


#: The only allowed rebuild transitions; anything else raises RebuildStateError
#: (docs/sync-protocol.md, "States").
REBUILD_TRANSITIONS: Mapping[tuple[RebuildPhase, RebuildEvent], RebuildPhase] = MappingProxyType({
    (RebuildPhase.IDLE, RebuildEvent.REQUESTED): RebuildPhase.SCANNING,
    (RebuildPhase.SCANNING, RebuildEvent.SCAN_DONE): RebuildPhase.STREAMING,
    (RebuildPhase.SCANNING, RebuildEvent.ABANDONED): RebuildPhase.IDLE,
    (RebuildPhase.STREAMING, RebuildEvent.SNAPSHOTS_SENT): RebuildPhase.AWAITING_VERIFY,
    (RebuildPhase.STREAMING, RebuildEvent.ALL_SWITCHED): RebuildPhase.IDLE,
    (RebuildPhase.STREAMING, RebuildEvent.ABANDONED): RebuildPhase.IDLE,
    (RebuildPhase.AWAITING_VERIFY, RebuildEvent.SNAPSHOT_OWED): RebuildPhase.STREAMING,
    (RebuildPhase.AWAITING_VERIFY, RebuildEvent.ALL_SWITCHED): RebuildPhase.IDLE,
    (RebuildPhase.AWAITING_VERIFY, RebuildEvent.ABANDONED): RebuildPhase.IDLE,
})


# --------------------------------------------------------------------------- inputs and outputs


@dataclass(frozen=True)
class WriteStamp:
    """What a WriteAck reports for a recorded store change.

    (epoch, sequence): a coordinator whose replica reached this position (compared as a
    tuple) holds the change: the next delta's position when changes are pending since the
    last cut, else the last cut's (an overwrite, a delete of a missing key, or a key whose
    bits were all set already needs no new delta; naming one that may never be cut would
    hold a read-your-writes hint forever). "Nothing pending" is judged by the checksum, so
    a 2^-64 coincidence could only make a coordinator drop its hint one push interval
    early. old_position: during a hand-over the change is in the old epoch too; the old
    epoch's position that holds it (same rule), so a coordinator still on the old epoch
    can drop its hint before the rebuild completes or, if it is abandoned, before the fresh
    epoch reaches it (docs/architecture.md#2-read-your-writes-through-a-coordinator).
    cut_due: about `cut_after_bits` bits changed since the last cut; cut now rather than
    at the next push tick (docs/architecture.md#3-bounded-staleness).
    """

    epoch: int
    sequence: int
    old_position: tuple[int, int] | None = None
    cut_due: bool = False


@dataclass(frozen=True)
class StoreCounters:
    """The daemon's counters of store traffic, passed into heartbeats and reports."""

    reads: int = 0
    reads_missed: int = 0
    writes: int = 0
    deletes: int = 0


@dataclass(frozen=True)
class NodeReport:
    """The node's figures: the wire stats (as heartbeats carry them) plus local-only counts."""

    stats: sync_pb2.NodeStats
    rebuilds_completed: int    # old filter retired after every coordinator verified the new one
    rebuilds_abandoned: int


@dataclass(frozen=True)
class Durable:
    """What must be on disk before any message of the same Ready goes out."""

    highest_epoch: int | None = None                # the largest epoch used: a start uses it + 1
    rebuilt_size: tuple[int, float] | None = None   # (capacity, target FPR) every coordinator switched to


@dataclass(frozen=True)
class StartScan:
    """Read the store in key order and hand each batch to scan_batch, then call scan_done
    (or scan_failed). `keys`: the key count when the scan began, for progress logs."""

    capacity: int
    target_fpr: float
    keys: int


@dataclass(frozen=True)
class LogLine:
    """One line for the daemon's log (the sync object has no logger)."""

    level: Literal["info", "warning", "error"]
    message: str
    fields: Mapping[str, object]


Action = StartScan | LogLine


@dataclass(frozen=True)
class Ready:
    """Everything the inputs since the last ack produced, in the order to carry it out:
    durable writes, then messages per peer (each in send order), then actions. Messages
    count as sent once returned (a lost one is repaired by the protocol's timers); the
    durable writes and actions stay pending until ack(ready)."""

    serial: int
    durable: Durable | None
    messages: Mapping[str, tuple[sync_pb2.NodeMessage, ...]]
    actions: tuple[Action, ...]

    @property
    def empty(self) -> bool:
        return self.durable is None and not self.messages and not self.actions


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
    lag: int    # sequences of the current epoch cut but not acknowledged by the peer


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

    def position_holding_now(self) -> tuple[int, int]:
        """The first position of this epoch whose state holds the filter as it is now (the
        rule of WriteStamp)."""
        if self.filter.checksum == self.checksum:
            return self.epoch, self.sequence
        return self.epoch, self.sequence + 1

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
class _Scan:
    """A rebuild filter being filled by the daemon's store scan, in key order."""

    filter: CountingBloomFilter
    capacity: int
    target_fpr: float
    keys_at_start: int
    started_at: float
    cursor: bytes | None = None      # highest key scanned in; writes of keys <= cursor count here too
    scanned: int = 0

    def covered(self, keys: Sequence[bytes]) -> np.ndarray | None:
        """Row indices of the keys the scan already passed; None when that is every key."""
        cursor = self.cursor
        if cursor is None:
            return np.zeros(0, dtype=np.intp)
        mask = np.fromiter((key <= cursor for key in keys), dtype=np.bool_, count=len(keys))
        return None if mask.all() else np.flatnonzero(mask)


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
    queued: list[sync_pb2.NodeMessage] = field(default_factory=list)   # Hello, heartbeats: due at once


# --------------------------------------------------------------------------- the protocol object


class NodeSync:
    """The node end of FilterSync for every coordinator this node talks to."""

    def __init__(self, node_id: str, storage_address: str, filter_: CountingBloomFilter, *,
                 epoch: int, capacity: int, target_fpr: float, key_count: int = 0,
                 config: NodeSyncConfig | None = None) -> None:
        """`filter_` holds the node's keys now (built from the store) and from here on belongs
        to this object (change it only through record); its pending changes become this
        epoch's baseline (sequence 0). `epoch` must be larger than any epoch this node id used
        before (persist it and add one on every start): a coordinator holding a replica of an
        earlier incarnation then resyncs instead of applying deltas to it."""
        if not node_id:
            raise ValueError("node_id must be a non-empty string")
        if isinstance(epoch, bool) or not isinstance(epoch, int) or epoch < 0:
            raise ValueError(f"epoch must be a non-negative integer, got {epoch!r}")
        if epoch > MAX_EPOCH:
            raise ValueError(f"epoch {epoch} is above {MAX_EPOCH}, the largest a position may carry: coordinators "
                             "would refuse every message (docs/sync-protocol.md, \"Positions that cannot follow\")")
        self.node_id = node_id
        self.storage_address = storage_address
        self.config = config or NodeSyncConfig()
        self._key_count = int(key_count)
        self._stream = _EpochStream(epoch, filter_, capacity, target_fpr, self.config)
        self._old: _EpochStream | None = None       # live only during a rebuild hand-over
        self._scan: _Scan | None = None              # live only while the phase is SCANNING
        self._phase = RebuildPhase.IDLE
        self._highest_epoch = epoch
        self._peers: dict[str, _Peer] = {}
        self._snapshot_ids = itertools.count(1)
        self._snapshot_cache: tuple[int, int, EncodedSnapshot, int] | None = None
        self._pending_bits = 0                       # estimated bits changed since the last cut
        self._bytes_pushed = 0
        self._rebuilds_completed = 0
        self._rebuilds_abandoned = 0
        self._handover_had_peers = False   # a coordinator was connected at some point of the hand-over
        # outputs waiting for ack(): durable writes and actions
        self._durable_epoch: int | None = None
        self._durable_size: tuple[int, float] | None = None
        self._actions: list[Action] = []
        self._ready_serial = 0

    # ------------------------------------------------------------------ read-only views
    @property
    def epoch(self) -> int:
        """The current epoch: the one new writes are sequenced in and Hellos advertise."""
        return self._stream.epoch

    @property
    def highest_epoch(self) -> int:
        """The largest epoch number used so far (an abandoned rebuild burns its number; one
        abandoned during the hand-over also takes a fresh one to go on under)."""
        return self._highest_epoch

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
    def key_count(self) -> int:
        """Keys in the store, as recorded (the count deltas, snapshots and stats carry)."""
        return self._key_count

    @property
    def filter(self) -> CountingBloomFilter:
        """The current filter, for reports and tests: read it, never write it (use record)."""
        return self._stream.filter

    @property
    def history_floor(self) -> int:
        """Lowest replica sequence of the current epoch that deltas can still catch up."""
        return self._stream.floor

    @property
    def rebuild_phase(self) -> RebuildPhase:
        return self._phase

    @property
    def rebuild_epoch(self) -> int:
        """The epoch being handed over to (0 when idle or still scanning)."""
        return self._stream.epoch if self._old is not None else 0

    @property
    def rebuild_progress(self) -> float:
        """0..1: the scan is the first half, peers switched the second half."""
        if self._phase is RebuildPhase.IDLE:
            return 0.0
        if self._scan is not None:
            scan = self._scan
            return 0.5 * scan.scanned / max(1, scan.keys_at_start, scan.scanned)
        if not self._peers:
            return 1.0
        return 0.5 + 0.5 * sum(p.switched for p in self._peers.values()) / len(self._peers)

    @property
    def peers(self) -> list[str]:
        return list(self._peers)

    def peer_status(self, peer: str) -> PeerStatus:
        p = self._peer(peer)
        s = self._stream
        lag = max(0, s.sequence - p.acked) if p.stream_epoch == s.epoch else s.sequence + 1
        return PeerStatus(peer=p.name, answered=p.answered, stream_epoch=p.stream_epoch, acked=p.acked,
                          sent=p.sent, in_flight_bytes=p.in_flight_bytes,
                          snapshot_in_progress=p.snapshot is not None, switched=p.switched,
                          bytes_sent=p.bytes_sent, lag=lag)

    def report(self, counters: StoreCounters) -> NodeReport:
        """The node's figures from this object's state plus the daemon's counters."""
        return NodeReport(stats=self._stats(counters), rebuilds_completed=self._rebuilds_completed,
                          rebuilds_abandoned=self._rebuilds_abandoned)

    # ------------------------------------------------------------------ writes
    def record(self, added: Sequence[bytes] = (), removed: Sequence[bytes] = ()) -> WriteStamp:
        """A committed store change: `added` keys are new in the store, `removed` keys were in
        it and are gone (no key in both; removed ones are uncounted first). Call it in the same
        critical section as the store commit, so no delta carries half a write and no key is
        in the store without its bits. Every live filter counts the change; a filter being
        scanned only for keys the scan already passed. Returns the WriteAck's stamp."""
        if removed:
            self._count(removed, add=False)
        if added:
            self._count(added, add=True)
        changed = len(added) + len(removed)
        self._key_count += len(added) - len(removed)
        self._pending_bits += changed * self._stream.geometry.hashes
        old = self._old.position_holding_now() if self._old is not None else None
        return WriteStamp(*self._stream.position_holding_now(), old_position=old,
                          cut_due=self._pending_bits >= self.config.cut_after_bits)

    def _count(self, keys: Sequence[bytes], *, add: bool) -> None:
        """Count keys in (or out of) every filter they belong to; each key is hashed once per
        geometry (docs/architecture.md#hash-once-per-key)."""
        targets: list[tuple[CountingBloomFilter, np.ndarray | None]] = [(self._stream.filter, None)]
        if self._old is not None:
            targets.append((self._old.filter, None))
        if self._scan is not None:
            rows = self._scan.covered(keys)
            if rows is None or rows.size:
                targets.append((self._scan.filter, rows))
        hashed: dict[Geometry, np.ndarray] = {}
        for filt, rows in targets:
            pos = hashed.get(filt.geometry)
            if pos is None:
                pos = hashed[filt.geometry] = hashing.positions(keys, filt.geometry)
            if rows is not None:
                pos = pos[rows]
            if add:
                filt.add_positions(pos)
            else:
                filt.remove_positions(pos)

    # ------------------------------------------------------------------ the change stream
    def cut(self) -> list[tuple[int, int]]:
        """Turn the pending filter changes into the next delta of each live epoch (kept in the
        history; every peer gets them through ready()). Returns the (epoch, sequence) of each
        delta cut: none when nothing changed, two during a hand-over (old epoch first)."""
        self._pending_bits = 0
        out: list[tuple[int, int]] = []
        for stream in (self._old, self._stream):
            if stream is not None and stream.cut(self._key_count) is not None:
                out.append((stream.epoch, stream.sequence))
        return out

    # ------------------------------------------------------------------ per-peer stream
    def connect(self, peer: str, now: float) -> None:
        """A stream to `peer` opened (or re-opened): drop its old cursor, queue the Hello."""
        s = self._stream
        hello = sync_pb2.Hello(
            node_id=self.node_id, storage_address=self.storage_address, geometry=s.geometry_proto,
            epoch=s.epoch, sequence=s.sequence, checksum=s.checksum, key_count=self._key_count,
            capacity=s.capacity, target_fpr=s.target_fpr, push_interval_ms=self.config.push_interval_ms,
            protocol_version=PROTOCOL_VERSION, history_floor=s.floor)
        self._peers[peer] = _Peer(name=peer, last_progress_at=now, queued=[sync_pb2.NodeMessage(hello=hello)])
        if self._old is not None:
            self._handover_had_peers = True

    def refused(self, peer: str, limit: str) -> None:
        """A coordinator ended `peer`'s stream because this node's filter breaks one of its limits
        (`limit`: the setting, from the stream's trailing metadata, shardsieve/limits.py). During a
        hand-over that no connected coordinator verified, a refused filter size means the new
        filter would never be taken: the rebuild is given up and the old filter goes on under a
        fresh epoch, so the node comes back at the size the coordinator accepted instead of
        being stranded (docs/node.md, "Rebuild"). Otherwise there is nothing to give up: the
        refusal is logged with what to do."""
        if self._old is not None and not any(p.switched for p in self._peers.values()):
            self._abandon(f"coordinator {peer} refuses the new filter ({self._stream.geometry}; setting {limit})")
            return
        self._log("error", "a coordinator refuses this node's filter", coordinator=peer, setting=limit,
                  geometry=str(self._stream.geometry),
                  fix="raise that setting on the coordinator, or give the node a smaller --capacity and restart it")

    def disconnect(self, peer: str) -> None:
        """The stream to `peer` ended; its cursor is dropped (the next connect starts over)."""
        if self._peers.pop(peer, None) is not None:
            self._maybe_retire()

    def receive(self, peer: str, msg: sync_pb2.CoordinatorMessage, now: float) -> None:
        """Handle one coordinator message. Raises a ProtocolViolation (state unchanged) for a
        message naming another node id, a future epoch, another geometry or an unproduced
        sequence, or a malformed rebuild request; the driver then resets the stream."""
        p = self._peer(peer)
        if msg.node_id and msg.node_id != self.node_id:
            raise WrongNodeId(f"coordinator message for node id {msg.node_id!r}, this node is {self.node_id!r}")
        kind = msg.WhichOneof("body")
        if kind == "ack":
            self._check_point(msg.ack.epoch, msg.ack.sequence, msg.ack.geometry if msg.ack.HasField("geometry") else None)
            p.answered = True
            self._on_ack(p, msg.ack.epoch, msg.ack.sequence, now)
        elif kind == "need_snapshot":
            p.answered = True
            self._on_need_snapshot(p, msg.need_snapshot)
        elif kind == "rebuild":
            self._on_rebuild_request(p, msg.rebuild, now)
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

    def heartbeat(self, peer: str, counters: StoreCounters) -> None:
        """Queue a Heartbeat for `peer`: this object's figures plus the daemon's counters."""
        self._peer(peer).queued.append(
            sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=self._stats(counters))))

    # ------------------------------------------------------------------ outputs
    def ready(self, now: float, budgets: Mapping[str, int]) -> Ready:
        """Everything due now, as one batch: the durable writes and actions not yet
        acknowledged, and per connected peer its queued Hello/heartbeats, then snapshot
        chunks and deltas after its cursor up to budgets[peer] bytes (at least one message
        if any is due; none when the budget is 0 or the peer is left out) and within its
        in-flight window. Until a peer answered the Hello it gets only the Hello and
        heartbeats. Resends from a peer's last ack when nothing was acknowledged for
        retransmit_after_s."""
        messages: dict[str, tuple[sync_pb2.NodeMessage, ...]] = {}
        for name, p in self._peers.items():
            out, p.queued = p.queued, []
            budget = budgets.get(name, 0)
            if budget > 0:
                out += self._outgoing(p, now, budget)
            if out:
                messages[name] = tuple(out)
        durable = None
        if self._durable_epoch is not None or self._durable_size is not None:
            durable = Durable(highest_epoch=self._durable_epoch, rebuilt_size=self._durable_size)
        self._ready_serial += 1
        return Ready(serial=self._ready_serial, durable=durable, messages=MappingProxyType(messages),
                     actions=tuple(self._actions))

    def ack(self, ready: Ready) -> None:
        """The driver carried out `ready` (durable writes done, messages handed to their
        streams, actions run): drop what it held from the pending outputs."""
        if ready.serial != self._ready_serial:
            raise StaleReady(f"ack of Ready {ready.serial}, but the last one returned is {self._ready_serial}")
        if ready.durable is not None:
            if self._durable_epoch == ready.durable.highest_epoch:
                self._durable_epoch = None
            if self._durable_size == ready.durable.rebuilt_size:
                self._durable_size = None
        del self._actions[:len(ready.actions)]

    # ------------------------------------------------------------------ rebuild
    def request_rebuild(self, capacity: int, target_fpr: float, *, reason: str, requested_by: str,
                        now: float) -> None:
        """Rebuild into a filter sized for capacity keys at target_fpr (same seed). Ignored
        while a rebuild runs (one at a time; coordinators see the phase in heartbeats).
        Otherwise the phase becomes SCANNING and the next Ready asks the daemon to scan its
        store (StartScan). ValueError (nothing changed) for a size that has no geometry."""
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise ValueError(f"rebuild capacity must be a positive integer, got {capacity!r}")
        if not 0.0 < target_fpr < 1.0:
            raise ValueError(f"rebuild target FPR must be strictly between 0 and 1, got {target_fpr!r}")
        if self._phase is not RebuildPhase.IDLE:
            return
        geometry = geometry_for(capacity, target_fpr, self._stream.geometry.seed)
        self._rebuild_event(RebuildEvent.REQUESTED)
        self._scan = _Scan(CountingBloomFilter(geometry), capacity, float(target_fpr),
                           keys_at_start=self._key_count, started_at=now)
        self._actions.append(StartScan(capacity=capacity, target_fpr=float(target_fpr), keys=self._key_count))
        self._log("info", "rebuild started", peer=requested_by, capacity=capacity, target_fpr=target_fpr,
                  geometry=str(geometry), keys=self._key_count, reason=reason)

    def scan_batch(self, keys: Sequence[bytes]) -> None:
        """The next keys of the store in key order (strictly ascending, above every key handed
        before), read in the same critical section as this call. RebuildStateError when no
        scan runs, ValueError for keys out of order; nothing changes then."""
        scan = self._running_scan()
        if not keys:
            return
        previous = scan.cursor
        for key in keys:
            if previous is not None and not key > previous:
                raise ValueError(f"scan keys must be strictly ascending and above the cursor: {key!r} "
                                 f"follows {previous!r}")
            previous = key
        scan.filter.add_positions(hashing.positions(keys, scan.filter.geometry))
        scan.cursor = keys[-1]
        scan.scanned += len(keys)

    def scan_done(self, now: float) -> None:
        """The scan reached the end of the store: the scanned filter holds every key (writes
        kept it so). It starts epoch = highest so far + 1 as the current filter and is handed
        over: every peer gets a REBUILD snapshot; the old filter keeps streaming to peers
        until their snapshot is cut and is retired once all connected peers switched."""
        scan = self._running_scan()
        self._rebuild_event(RebuildEvent.SCAN_DONE)
        self._scan = None
        self.cut()   # the old epoch's last changes before the split point
        self._highest_epoch += 1
        self._durable_epoch = self._highest_epoch
        self._old = self._stream
        self._stream = _EpochStream(self._highest_epoch, scan.filter, scan.capacity, scan.target_fpr, self.config)
        self._handover_had_peers = bool(self._peers)
        for p in self._peers.values():
            p.switched = False
            p.rebuild_rejections = 0
            if p.answered:
                p.wanted = (PURPOSE_REBUILD, "rebuild")
                if p.snapshot is not None and not p.snapshot.all_sent:
                    p.snapshot = None    # an unfinished old-epoch snapshot: superseded
        self._log("info", "rebuild scan complete, streaming the new filter", epoch=self._stream.epoch,
                  keys=scan.scanned, seconds=round(now - scan.started_at, 3))
        self._maybe_retire()

    def scan_failed(self, reason: str) -> None:
        """The daemon could not finish the scan: the rebuild is abandoned (the old filter and
        epoch stay current; the epoch number it would have used is burned)."""
        self._running_scan()
        self._abandon(reason)

    # ------------------------------------------------------------------ internals
    def _rebuild_event(self, event: RebuildEvent) -> None:
        """Apply one rebuild event by the transition table, or raise (nothing changed)."""
        try:
            self._phase = REBUILD_TRANSITIONS[(self._phase, event)]
        except KeyError:
            raise RebuildStateError(
                f"rebuild event {event.name} ({event.value}) is not allowed in phase {self._phase.name}") from None

    def _running_scan(self) -> _Scan:
        if self._scan is None:
            raise RebuildStateError(f"no rebuild scan is running (phase {self._phase.name})")
        return self._scan

    def _log(self, level: Literal["info", "warning", "error"], message: str, **fields: object) -> None:
        self._actions.append(LogLine(level=level, message=message, fields=MappingProxyType(fields)))

    def _stats(self, counters: StoreCounters) -> sync_pb2.NodeStats:
        s = self._stream
        return sync_pb2.NodeStats(
            key_count=self._key_count, capacity=s.capacity, geometry=s.geometry_proto, fill=s.filter.fill(),
            predicted_fpr=s.filter.predicted_fpr(), reads=counters.reads, reads_missed=counters.reads_missed,
            writes=counters.writes, deletes=counters.deletes, bytes_pushed=self._bytes_pushed, epoch=s.epoch,
            sequence=s.sequence, target_fpr=s.target_fpr, rebuild_epoch=self.rebuild_epoch,
            rebuild_progress=self.rebuild_progress, rebuild_phase=self._phase.value,
            saturated_counters=s.filter.saturated_counters())

    def _abandon(self, reason: str) -> None:
        """End the rebuild without a switch. Only while no peer switched to the new epoch.

        Abandoned while scanning: no message named the new epoch, so its number is burned and the
        current epoch goes on. Abandoned during the hand-over: coordinators may hold the new epoch
        already (a lost SnapshotVerified), and a coordinator never takes an epoch older than its
        replica (docs/sync-protocol.md, "Positions that cannot follow"). So the old filter goes on
        under a fresh epoch, highest used + 1, whose baseline is that filter now, and every peer
        gets a snapshot of it: nothing this node sends is ever older than what it sent before."""
        if self._old is not None and any(p.switched for p in self._peers.values()):
            raise RebuildStateError("a coordinator already routes with the new epoch; it cannot be abandoned")
        self._rebuild_event(RebuildEvent.ABANDONED)
        abandoned = self._highest_epoch + 1 if self._old is None else self._stream.epoch
        self._highest_epoch += 1   # the scan's number is burned, or the fresh epoch is taken
        if self._old is None:
            self._scan = None
        else:
            old, self._old = self._old, None
            self._stream = _EpochStream(self._highest_epoch, old.filter, old.capacity, old.target_fpr, self.config)
            for p in self._peers.values():
                p.stream_epoch = None
                p.acked = p.sent = -1
                p.in_flight.clear()
                p.in_flight_bytes = 0
                p.snapshot = None
                p.switched = False
                p.rebuild_rejections = 0
                p.wanted = (PURPOSE_RESYNC, f"rebuild abandoned; continuing under epoch {self._highest_epoch}")
        self._durable_epoch = self._highest_epoch
        self._rebuilds_abandoned += 1
        self._log("warning", "rebuild abandoned", epoch=abandoned, current_epoch=self._stream.epoch, reason=reason)

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

    def _on_rebuild_request(self, p: _Peer, request: sync_pb2.RebuildRequest, now: float) -> None:
        if request.capacity < 1 or not 0.0 < request.target_fpr < 1.0:
            raise MalformedMessage(
                f"rebuild request needs capacity >= 1 and 0 < target_fpr < 1, got {request.capacity}, "
                f"{request.target_fpr}")
        try:
            geometry_for(int(request.capacity), float(request.target_fpr), self._stream.geometry.seed)
        except GeometryError as exc:
            raise MalformedMessage(f"rebuild request for capacity {request.capacity} at target FPR "
                                   f"{request.target_fpr} has no supported geometry: {exc}") from exc
        self.request_rebuild(int(request.capacity), float(request.target_fpr), reason=request.reason,
                             requested_by=p.name, now=now)

    def _on_ack(self, p: _Peer, epoch: int, sequence: int, now: float, verified_id: int | None = None) -> None:
        """Ack and SnapshotVerified: the coordinator's replica is at (epoch, sequence)."""
        snap = p.snapshot
        if self._live(epoch) is None:
            # an epoch already retired (a late message), or one a coordinator took before the
            # rebuild was abandoned: every epoch since is newer, and this peer gets a snapshot
            return
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
            self._log("info", "coordinator switched to the rebuilt filter", peer=p.name, epoch=epoch)

    def _drop_in_flight(self, p: _Peer, sequence: int) -> None:
        while p.in_flight and p.in_flight[0][0] <= sequence:
            p.in_flight_bytes -= p.in_flight.popleft()[1]

    def _purpose_for(self, p: _Peer) -> int:
        return PURPOSE_REBUILD if self._old is not None and not p.switched else PURPOSE_RESYNC

    def _on_need_snapshot(self, p: _Peer, ns: sync_pb2.NeedSnapshot) -> None:
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
                    self._abandon(detail)
                    return
                raise SnapshotRefused(detail)
            p.wanted = (PURPOSE_REBUILD, f"retry after rejection: {rejected.detail}")
            return
        p.resync_rejections += 1
        if p.resync_rejections >= self.config.max_resync_rejections:
            raise SnapshotRefused(f"coordinator {p.name} rejected {p.resync_rejections} snapshots "
                                  f"(last: {rejected.detail})")
        p.wanted = (self._purpose_for(p), f"retry after rejection: {rejected.detail}")

    def _outgoing(self, p: _Peer, now: float, max_bytes: int) -> list[sync_pb2.NodeMessage]:
        """Snapshot chunks, then deltas after p's cursor, up to about max_bytes."""
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
        self._bytes_pushed += used
        return out

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
                snap = self._start_snapshot(p)
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

    def _start_snapshot(self, p: _Peer) -> _OutgoingSnapshot:
        assert p.wanted is not None
        purpose, reason = p.wanted
        p.wanted = None
        if purpose == PURPOSE_REBUILD and (self._old is None or p.switched):
            purpose = PURPOSE_RESYNC
        self.cut()   # the snapshot describes exactly the state at the sequence just cut
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
                total_bytes=encoded.total_bytes, data=data, checksum=checksum, key_count=self._key_count,
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
        self._log("info", "snapshot cut", peer=p.name, epoch=s.epoch, sequence=s.sequence,
                  purpose="rebuild" if purpose == PURPOSE_REBUILD else "resync", reason=reason,
                  encoded_bytes=encoded.total_bytes)
        return snap

    def _update_phase(self) -> None:
        """During a hand-over: AWAITING_VERIFY once every peer still to switch has its rebuild
        snapshot sent, back to STREAMING when one needs a snapshot again."""
        if self._old is None:
            return
        waiting = [p for p in self._peers.values() if not p.switched]
        all_sent = all(p.snapshot is not None and p.snapshot.all_sent for p in waiting)
        if all_sent and self._phase is RebuildPhase.STREAMING:
            self._rebuild_event(RebuildEvent.SNAPSHOTS_SENT)
        elif not all_sent and self._phase is RebuildPhase.AWAITING_VERIFY:
            self._rebuild_event(RebuildEvent.SNAPSHOT_OWED)

    def _maybe_retire(self) -> None:
        """Every connected peer switched: stop writing the old filter, drop it, and persist
        the new size (a restart keeps it). A hand-over that had coordinators needs at least one
        of them to have verified the new filter: if every one went away (or refused it) without
        doing so, the old filter stays, and a restart comes back at the old size — never at a
        size no coordinator took. A node without coordinators retires at once."""
        if self._old is None:
            return
        peers = self._peers.values()
        if not all(p.switched for p in peers) or (self._handover_had_peers and not any(p.switched for p in peers)):
            self._update_phase()
            return
        old, self._old = self._old, None
        self._rebuild_event(RebuildEvent.ALL_SWITCHED)
        s = self._stream
        self._durable_size = (s.capacity, s.target_fpr)
        self._rebuilds_completed += 1
        self._log("info", "rebuild complete, old filter retired", old_epoch=old.epoch, epoch=s.epoch,
                  capacity=s.capacity, geometry=str(s.geometry))


def _reason_text(reason: int) -> str:
    try:
        return sync_pb2.SnapshotReason.Name(reason).removeprefix("SNAPSHOT_REASON_")
    except ValueError:
        return f"reason {reason}"
