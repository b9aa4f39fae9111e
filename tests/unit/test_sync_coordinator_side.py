"""Unit tests of the coordinator end of the sync protocol (CoordinatorSync): one rule per test.

Requirement sources named beside the assertions: docs/sync-protocol.md ("Coordinator side",
"The rebuild hand-over", "Why the promises hold") and the promises of docs/architecture.md;
the events each call reports follow docs/architecture.md#how-events-flow. The node side is driven
by hand-made messages (deltas encoded with the project codec from change sets written out
here), so each rule is tested in isolation. Filter contents are checked against an
independent computation of the hash scheme with mmh3 directly (MurmurHash3 x64 128,
Kirsch & Mitzenmacher 2006 double hashing, multiply-shift range reduction).
"""

from __future__ import annotations

import itertools

import mmh3
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import encode_delta
from shardsieve.geometry import Geometry
from shardsieve.snapshot import encode_snapshot
from shardsieve.sync.coordinator_side import (
    CoordinatorSync,
    CoordinatorSyncConfig,
    DictReplicaSink,
    NodeUnlisted,
    RebuildRequested,
    ReplicaAdvanced,
    ReplicaInstalled,
    ResyncRequested,
    SnapshotRejected,
    StatsReported,
    StreamClosed,
    StreamOpened,
    holds_write,
)
from shardsieve.sync.errors import (
    EpochBehindReplica,
    HelloTwice,
    InvalidHello,
    MalformedMessage,
    NotOpened,
    StaleStream,
    UnsupportedProtocolVersion,
    WrongNodeId,
)
from shardsieve.v1 import filter_pb2, sync_pb2

NODE = "node-kestrel-4"
G = Geometry(bits=1024, hashes=4, seed=1)
G2 = Geometry(bits=4096, hashes=6, seed=1)
R = sync_pb2
_SNAPSHOT_IDS = itertools.count(1)


def reference_positions(key: str, g: Geometry) -> list[int]:
    """Positions by the published recipe, computed here from mmh3 alone."""
    digest = mmh3.mmh3_x64_128_digest(key.encode(), g.seed)
    h1 = int.from_bytes(digest[:8], "little")
    h2 = int.from_bytes(digest[8:], "little")
    return sorted({(((h1 + i * h2) % 2**64) * g.bits) >> 64 for i in range(g.hashes)})


class FakeNode:
    """Produces the messages a node would send, from explicit change sets."""

    def __init__(self, geometry: Geometry = G, epoch: int = 1) -> None:
        self.geometry = geometry
        self.epoch = epoch
        self.sequence = 0
        self.bloom = BloomFilter(geometry)

    def hello(self, floor: int = 0, node_id: str = NODE, version: int = 1) -> sync_pb2.Hello:
        return sync_pb2.Hello(node_id=node_id, storage_address="10.0.0.9:7100", geometry=self.geometry.to_proto(),
                              epoch=self.epoch, sequence=self.sequence, checksum=self.bloom.checksum, key_count=3,
                              capacity=90, target_fpr=0.01, push_interval_ms=50, protocol_version=version,
                              history_floor=floor)

    def add_key(self, key: str) -> sync_pb2.NodeMessage:
        """The delta that adds key (only the bits not set yet)."""
        new = [p for p in reference_positions(key, self.geometry) if not self.bloom.bits[p]]
        return self.delta(ChangeSet.of(new, []))

    def delta(self, changes: ChangeSet) -> sync_pb2.NodeMessage:
        self.bloom.apply(changes)
        self.sequence += 1
        return sync_pb2.NodeMessage(delta=filter_pb2.Delta(
            epoch=self.epoch, sequence=self.sequence, payload=encode_delta(changes, self.geometry.bits),
            checksum=self.bloom.checksum, key_count=self.sequence))

    def snapshot(self, purpose=filter_pb2.SNAPSHOT_PURPOSE_RESYNC, chunk: int = 1 << 20) -> list[sync_pb2.NodeMessage]:
        self.snapshot_id = next(_SNAPSHOT_IDS)   # one increasing counter per node process
        enc = encode_snapshot(self.bloom, max_chunk_bytes=chunk)
        return [sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
            snapshot_id=self.snapshot_id, epoch=self.epoch, sequence=self.sequence,
            geometry=self.geometry.to_proto(), encoding=enc.encoding, purpose=purpose, chunk_index=i,
            chunk_count=enc.chunk_count, total_bytes=enc.total_bytes, data=data, checksum=self.bloom.checksum,
            key_count=7, capacity=90)) for i, data in enumerate(enc.chunks)]


def kinds(messages) -> list[str]:
    return [m.WhichOneof("body") for m in messages]


def reasons(messages) -> list[str]:
    return [R.SnapshotReason.Name(m.need_snapshot.reason) for m in messages if m.WhichOneof("body") == "need_snapshot"]


def send_all(sync: CoordinatorSync, messages, stream=1, now=0.0) -> list[sync_pb2.CoordinatorMessage]:
    out = []
    for m in messages:
        out += sync.receive(NODE, stream, m, now).replies
    return out


def events_of(sync: CoordinatorSync, messages, stream=1, now=0.0) -> list:
    out = []
    for m in messages:
        out += sync.receive(NODE, stream, m, now).events
    return out


def synced(keys=("box-1",)) -> tuple[CoordinatorSync, DictReplicaSink, FakeNode]:
    sink = DictReplicaSink()
    sync = CoordinatorSync(sink, CoordinatorSyncConfig(need_snapshot_retry_s=1.0))
    node = FakeNode()
    for key in keys:
        node.add_key(key)
    sync.open(1, node.hello(floor=node.sequence), 0.0)
    send_all(sync, node.snapshot())
    return sync, sink, node


# ----------------------------------------------------------------------------- opening


def test_first_contact_asks_for_a_snapshot_and_installs_it() -> None:
    sink = DictReplicaSink()
    sync = CoordinatorSync(sink)
    node = FakeNode()
    node.add_key("box-1")
    opened = sync.open(1, node.hello(floor=1), 0.0)
    out = opened.replies
    assert reasons(out) == ["SNAPSHOT_REASON_NO_REPLICA"]          # docs/sync-protocol.md, "Coordinator side"
    assert out[0].node_id == NODE
    assert opened.events == (StreamOpened(NODE, 1, "10.0.0.9:7100", False, None),
                             ResyncRequested(NODE, "NO_REPLICA", out[0].need_snapshot.detail))
    chunks = node.snapshot(chunk=8)
    *assembling, last = [sync.receive(NODE, 1, m, 0.0) for m in chunks]
    assert all(r.replies == () and r.events == () for r in assembling)
    replies = list(last.replies)
    assert kinds(replies) == ["ack"] and (replies[0].ack.epoch, replies[0].ack.sequence) == (1, 1)
    assert last.events == (ReplicaInstalled(NODE, 1, 1, G, rebuild=False),)
    assert Geometry.from_proto(replies[0].ack.geometry) == G
    bits = sink.replicas[NODE].bits
    assert all(bits[p] for p in reference_positions("box-1", G))   # reference: mmh3 directly
    view = sync.node(NODE)
    assert view.connected and view.has_replica and (view.epoch, view.sequence) == (1, 1)
    assert view.counters.snapshots_installed == 1 and view.counters.need_snapshot == {"NO_REPLICA": 1}


@pytest.mark.parametrize("hello, error", [
    (FakeNode().hello(node_id=""), InvalidHello),
    (FakeNode().hello(version=2), UnsupportedProtocolVersion),
    (sync_pb2.Hello(node_id=NODE, protocol_version=1, geometry=filter_pb2.Geometry(bits=1000, hashes=4, scheme=1)),
     InvalidHello),
    (sync_pb2.Hello(node_id=NODE, protocol_version=1), InvalidHello),
])
def test_bad_hellos_are_refused_and_change_nothing(hello, error) -> None:
    sync = CoordinatorSync(DictReplicaSink())
    with pytest.raises(error):                 # docs/architecture.md#5-bad-input-changes-nothing
        sync.open(1, hello, 0.0)
    assert sync.node_ids() == []


def test_reconnect_within_history_is_acked_at_the_replica_position() -> None:
    sync, sink, node = synced()
    closed = sync.close(NODE, 1, 1.0)
    assert closed.events == (StreamClosed(NODE, 1),) and closed.replies == ()
    # the replica stays, and routing lists the node as stale (docs/coordinator.md, freshness contract (c))
    assert not sync.node(NODE).connected and NODE in sink.replicas
    node.add_key("box-2")
    out = sync.open(2, node.hello(floor=1), 2.0).replies
    assert kinds(out) == ["ack"] and out[0].ack.sequence == 1       # catch up from delta 2


def test_reconnect_below_the_history_floor_needs_a_snapshot() -> None:
    sync, _, node = synced()
    sync.close(NODE, 1)
    node.add_key("box-2")
    node.add_key("box-3")
    out = sync.open(2, node.hello(floor=2), 0.0).replies
    assert reasons(out) == ["SNAPSHOT_REASON_BEHIND_HISTORY"]


def test_reconnect_with_a_new_epoch_needs_a_snapshot() -> None:
    sync, _, node = synced()
    sync.close(NODE, 1)
    node.epoch = 2
    out = sync.open(2, node.hello(), 0.0).replies
    assert reasons(out) == ["SNAPSHOT_REASON_UNKNOWN_EPOCH"]


def test_a_node_restarted_without_a_new_epoch_is_resynced_not_patched() -> None:
    # docs/sync-protocol.md "Node restarts and epochs": the daemon must bump the epoch; if it
    # does not, the coordinator notices the sequence went backwards and takes any snapshot.
    sync, sink, node = synced(keys=("box-1", "box-2"))
    sync.close(NODE, 1)
    reborn = FakeNode()                       # same epoch 1, sequence 0, other contents
    reborn.add_key("box-9")
    out = sync.open(2, reborn.hello(floor=0), 0.0).replies
    assert reasons(out) == ["SNAPSHOT_REASON_UNKNOWN_EPOCH"]
    late = sync.receive(NODE, 2, reborn.add_key("box-10"), 0.0)      # rate-limited, not applied
    assert reasons(late.replies) == [] and late.events == ()
    send_all(sync, reborn.snapshot(), stream=2)
    assert sink.replicas[NODE] == reborn.bloom and sync.node(NODE).sequence == reborn.sequence


def test_a_restarted_coordinator_asks_every_node_for_a_snapshot() -> None:
    _, _, node = synced()
    fresh = CoordinatorSync(DictReplicaSink())      # all soft state lost
    assert reasons(fresh.open(1, node.hello(floor=node.sequence), 0.0).replies) == ["SNAPSHOT_REASON_NO_REPLICA"]


# ----------------------------------------------------------------------------- deltas


def test_deltas_apply_in_order_and_are_acked() -> None:
    sync, sink, node = synced()
    results = [sync.receive(NODE, 1, m, 5.0) for m in (node.add_key("box-2"), node.add_key("box-3"))]
    out = [m for r in results for m in r.replies]
    assert [(m.ack.epoch, m.ack.sequence) for m in out] == [(1, 2), (1, 3)]
    assert [r.events for r in results] == [(ReplicaAdvanced(NODE, 1, 2),), (ReplicaAdvanced(NODE, 1, 3),)]
    assert sink.replicas[NODE] == node.bloom
    assert sync.node(NODE).last_applied_at == 5.0 and sync.node(NODE).counters.deltas_applied == 2


def test_duplicates_are_acked_and_ignored() -> None:
    sync, sink, node = synced()
    d2 = node.add_key("box-2")
    send_all(sync, [d2])
    before = sink.replicas[NODE].copy()
    out = send_all(sync, [d2, d2])
    assert [m.ack.sequence for m in out] == [2, 2]                 # docs/sync-protocol.md: ack and ignore
    assert sink.replicas[NODE] == before and sync.node(NODE).counters.duplicates == 2
    assert events_of(sync, [d2]) == []                            # nothing changed


def test_a_gap_asks_for_a_snapshot_once_per_retry_interval() -> None:
    sync, sink, node = synced()
    node.add_key("box-2")                                          # delta 2 lost
    d3, d4 = node.add_key("box-3"), node.add_key("box-4")
    before = sink.replicas[NODE].copy()
    gap = sync.receive(NODE, 1, d3, 0.0)
    assert reasons(gap.replies) == ["SNAPSHOT_REASON_GAP"]        # docs/sync-protocol.md, "Coordinator side"
    assert gap.events == (ResyncRequested(NODE, "GAP", "delta 3 after 1"),)
    assert sync.node(NODE).awaiting_snapshot == "GAP" and not sync.node(NODE).synced
    assert sync.receive(NODE, 1, d4, 0.5).replies == ()           # one request per retry interval
    assert reasons(sync.receive(NODE, 1, d4, 1.5).replies) == ["SNAPSHOT_REASON_GAP"]
    assert sink.replicas[NODE] == before and sync.node(NODE).sequence == 1
    send_all(sync, node.snapshot())
    assert sync.node(NODE).awaiting_snapshot is None and sink.replicas[NODE] == node.bloom
    assert sync.node(NODE).synced


def test_a_bad_payload_asks_for_a_snapshot_and_changes_nothing() -> None:
    sync, sink, node = synced()
    d2 = node.add_key("box-2")
    d2.delta.payload = d2.delta.payload[:-1] + bytes([d2.delta.payload[-1] ^ 0x40])   # fails the CRC
    before = sink.replicas[NODE].copy()
    assert reasons(sync.receive(NODE, 1, d2, 0.0).replies) == ["SNAPSHOT_REASON_BAD_PAYLOAD"]
    assert sink.replicas[NODE] == before and sync.node(NODE).sequence == 1


def test_a_checksum_mismatch_asks_for_a_snapshot_before_touching_the_sink() -> None:
    sync, sink, node = synced()
    d2 = node.add_key("box-2")
    d2.delta.checksum ^= 1
    applied = []

    class Spy(DictReplicaSink):
        def apply(self, node_id, changes):
            applied.append(node_id)

    sync.sink = Spy()
    assert reasons(sync.receive(NODE, 1, d2, 0.0).replies) == ["SNAPSHOT_REASON_CHECKSUM_MISMATCH"]
    assert applied == [] and sync.node(NODE).sequence == 1


def test_a_delta_that_does_not_fit_the_replica_is_a_checksum_mismatch() -> None:
    sync, sink, node = synced(keys=("box-1",))
    # clearing a bit that is 0 in the replica, with a checksum that agrees with the claim:
    # the sink refuses it all-or-nothing
    zero = next(p for p in range(G.bits) if not sink.replicas[NODE].bits[p])
    changes = ChangeSet.of([], [zero])
    msg = sync_pb2.NodeMessage(delta=filter_pb2.Delta(
        epoch=1, sequence=2, payload=encode_delta(changes, G.bits),
        checksum=changes.checksum_after(sink.replicas[NODE].checksum)))
    before = sink.replicas[NODE].copy()
    assert reasons(sync.receive(NODE, 1, msg, 0.0).replies) == ["SNAPSHOT_REASON_CHECKSUM_MISMATCH"]
    assert sink.replicas[NODE] == before


def test_a_delta_of_an_unknown_epoch_asks_for_a_snapshot() -> None:
    sync, _, node = synced()
    node.epoch = 3
    node.sequence = 0
    assert reasons(sync.receive(NODE, 1, node.add_key("box-2"), 0.0).replies) == ["SNAPSHOT_REASON_UNKNOWN_EPOCH"]


# ----------------------------------------------------------------------------- stream rules


def test_protocol_violations_raise_and_change_nothing() -> None:
    sync, sink, node = synced()
    d2 = node.add_key("box-2")
    with pytest.raises(HelloTwice):
        sync.receive(NODE, 1, sync_pb2.NodeMessage(hello=node.hello()), 0.0)
    with pytest.raises(WrongNodeId):                       # stream 1 belongs to NODE
        sync.receive("node-other-1", 1, d2, 0.0)
    with pytest.raises(NotOpened):                         # a delta before any Hello
        sync.receive(NODE, 99, d2, 0.0)
    with pytest.raises(MalformedMessage):
        sync.receive(NODE, 1, sync_pb2.NodeMessage(), 0.0)
    with pytest.raises(HelloTwice):                        # the same stream id opened again
        sync.open(1, node.hello(), 0.0)
    assert sync.node(NODE).sequence == 1 and sink.replicas[NODE] != node.bloom


def test_a_newer_stream_takes_over_and_the_old_one_is_stale() -> None:
    sync, sink, node = synced()
    d2 = node.add_key("box-2")
    opened = sync.open(2, node.hello(floor=1), 0.0)
    assert opened.events[0] == StreamOpened(NODE, 2, "10.0.0.9:7100", took_over=True, replaced_stream=1)
    with pytest.raises(StaleStream):
        sync.receive(NODE, 1, d2, 0.0)
    assert kinds(sync.receive(NODE, 2, d2, 0.0).replies) == ["ack"]
    assert sync.close(NODE, 1).events == ()               # closing the old stream does not disconnect
    assert sync.node(NODE).connected and sync.node(NODE).counters.stream_takeovers == 1


def test_heartbeats_are_stored_and_answered_with_the_position() -> None:
    sync, _, node = synced()
    result = sync.receive(NODE, 1, sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=sync_pb2.NodeStats(
        key_count=3, reads=40, reads_missed=2, epoch=1, sequence=4))), 7.0)
    out = result.replies
    assert kinds(out) == ["ack"] and out[0].ack.sequence == 1   # lets the node resend 2..4
    view = sync.node(NODE)
    assert view.stats.reads_missed == 2 and view.last_heard_at == 7.0
    assert result.events == (StatsReported(NODE, view.stats),)


def test_covers_tells_when_a_read_your_writes_hint_can_go() -> None:
    # docs/architecture.md#2-read-your-writes-through-a-coordinator; docs/sync-protocol.md, promise 2
    sync, _, node = synced()
    assert sync.covers(NODE, 1, 1) and not sync.covers(NODE, 1, 2)
    send_all(sync, [node.add_key("box-2")])
    assert sync.covers(NODE, 1, 2) and not sync.covers(NODE, 2, 0) and sync.covers(NODE, 0, 50)
    # a write during a hand-over to epoch 2, also written to epoch 1's filter at (1, 2)
    assert sync.covers(NODE, 2, 7, old=(1, 2)) and not sync.covers(NODE, 2, 7, old=(1, 3))
    assert not sync.covers(NODE, 2, 7, old=(0, 2))          # the old position counts only in its own epoch
    assert not sync.covers("node-nobody", 0, 0)


@pytest.mark.parametrize("replica, position, old, held", [
    ((3, 10), (3, 10), None, True), ((3, 9), (3, 10), None, False), ((4, 0), (3, 10), None, True),
    ((5, 40), (6, 3), (5, 40), True), ((5, 39), (6, 3), (5, 40), False), ((4, 99), (6, 3), (5, 40), False),
    ((6, 2), (6, 3), (5, 1), False),   # left the old epoch short of the new position: only the new one counts
])
def test_holds_write_is_the_rule_of_the_sync_protocol_doc(replica, position, old, held) -> None:
    """The cases worked out by hand from docs/sync-protocol.md, "Why the promises hold", promise 2."""
    assert holds_write(replica, position, old) is held


# ----------------------------------------------------------------------------- snapshots and rebuild


def test_a_snapshot_older_than_the_replica_is_not_installed() -> None:
    sync, sink, node = synced(keys=[f"box-{i}" for i in range(1, 12)])
    d_next = node.add_key("box-20")
    snapshot = node.snapshot(chunk=4)           # the state at the sequence of d_next
    d_after = node.add_key("box-21")
    assert len(snapshot) > 1
    assert send_all(sync, snapshot[:1]) == []   # assembly starts (replica one behind)...
    send_all(sync, [d_next, d_after])           # ...then deltas move the replica past it
    out = send_all(sync, snapshot[1:])          # completing it must not take d_after back
    assert kinds(out) == ["ack"] and out[0].ack.sequence == node.sequence
    assert sink.replicas[NODE] == node.bloom    # docs/architecture.md#1-no-false-negatives-once-synced
    assert all(sink.replicas[NODE].bits[p] for p in reference_positions("box-21", G))


def test_rebuild_snapshot_swaps_in_a_new_geometry_and_is_verified() -> None:
    sync, sink, node = synced()
    asked = sync.request_rebuild(NODE, 400, 0.01, "fill above target", 3.0)
    (msg,) = asked.replies
    assert msg.rebuild.capacity == 400 and msg.node_id == NODE
    assert asked.events == (RebuildRequested(NODE, msg.rebuild.request_id, 400, 0.01, "fill above target"),)
    assert sync.node(NODE).rebuild.phase == "requested"
    new = FakeNode(G2, epoch=2)
    for key in ("box-1", "box-2"):
        new.add_key(key)
    chunks = new.snapshot(purpose=filter_pb2.SNAPSHOT_PURPOSE_REBUILD, chunk=16)
    assert len(chunks) > 1
    out = send_all(sync, chunks[:1])
    # old-epoch deltas keep applying while the new snapshot assembles (docs/sync-protocol.md,
    # "The rebuild hand-over", step 4)
    out += send_all(sync, [node.add_key("box-2")])
    assert sync.node(NODE).sequence == 2 and sync.node(NODE).epoch == 1
    *_, last = [sync.receive(NODE, 1, m, 4.0) for m in chunks[1:]]
    out = list(last.replies)
    assert last.events == (ReplicaInstalled(NODE, 2, new.sequence, G2, rebuild=True),)
    assert kinds(out) == ["snapshot_verified", "ack"]
    assert out[0].snapshot_verified.epoch == 2 and out[1].ack.epoch == 2
    replica = sink.replicas[NODE]
    assert replica.geometry == G2 and all(replica.bits[p] for p in reference_positions("box-2", G2))
    view = sync.node(NODE)
    assert view.rebuild.phase == "switched" and view.geometry == G2 and view.epoch == 2
    # an old-epoch delta after the switch cannot follow the replica: refused, nothing changes
    # (docs/sync-protocol.md, "Positions that cannot follow")
    with pytest.raises(EpochBehindReplica) as refused:
        send_all(sync, [node.add_key("box-3")])
    assert (refused.value.epoch, refused.value.replica_epoch) == (1, 2)
    assert sync.node(NODE).epoch == 2 and sink.replicas[NODE] is replica


def test_a_corrupt_snapshot_is_rejected_and_the_replica_stays() -> None:
    sync, sink, node = synced()
    new = FakeNode(G2, epoch=2)
    new.add_key("box-1")
    chunks = new.snapshot(purpose=filter_pb2.SNAPSHOT_PURPOSE_REBUILD)
    chunks[0].snapshot_chunk.checksum ^= 0xFF
    before = sink.replicas[NODE].copy()
    rejected = sync.receive(NODE, 1, chunks[0], 0.0)
    out = send_all(sync, chunks[1:])
    assert out == [] and kinds(rejected.replies) == ["snapshot_rejected"]
    assert rejected.replies[0].snapshot_rejected.snapshot_id == new.snapshot_id
    assert rejected.events == (SnapshotRejected(NODE, new.snapshot_id, rejected.replies[0].snapshot_rejected.detail),)
    assert sink.replicas[NODE] == before and sync.node(NODE).epoch == 1
    assert send_all(sync, chunks) == []                      # late repeats of the refused attempt


def test_request_rebuild_refuses_bad_sizes_and_unknown_nodes() -> None:
    sync, _, _ = synced()
    with pytest.raises(ValueError, match="capacity"):
        sync.request_rebuild(NODE, 0, 0.01, "x", 0.0)
    with pytest.raises(ValueError, match="target_fpr"):
        sync.request_rebuild(NODE, 10, 1.5, "x", 0.0)
    with pytest.raises(KeyError):
        sync.request_rebuild("node-nobody", 10, 0.01, "x", 0.0)


def test_a_snapshot_at_the_replica_position_with_another_checksum_replaces_the_replica() -> None:
    """Same epoch and sequence, different filter: the replica diverged from the node, so the
    node's verified snapshot wins (docs/architecture.md#1-no-false-negatives-once-synced: the
    replica must hold every key the node's filter holds). The same snapshot with the replica's own checksum is only acked."""
    sync, sink, node = synced(keys=["box-1", "box-2"])
    same = node.snapshot()
    out = send_all(sync, same)
    assert kinds(out) == ["ack"] and sync.node(NODE).counters.snapshots_installed == 1   # nothing to do
    extra = [p for p in reference_positions("box-99", G) if not node.bloom.bits[p]]
    node.bloom.apply(ChangeSet.of(extra, []))   # the node's filter moves without a delta
    before = sink.replicas[NODE].copy()
    assert before != node.bloom and sync.node(NODE).sequence == node.sequence
    out = send_all(sync, node.snapshot(chunk=8))
    assert kinds(out) == ["ack"] and sync.node(NODE).counters.snapshots_installed == 2
    assert sink.replicas[NODE] == node.bloom and sync.node(NODE).checksum == node.bloom.checksum
    assert all(sink.replicas[NODE].bits[p] for p in reference_positions("box-99", G))


# ----------------------------------------------------------------------------- unlisting and the accessor


def test_unlist_drops_the_node_and_reports_what_it_had() -> None:
    sync, sink, node = synced(keys=("box-1", "box-2"))
    assert sync.unlist(NODE).events == (NodeUnlisted(NODE, was_connected=True, had_replica=True, key_count=7),)
    assert NODE not in sink.replicas and sync.node(NODE) is None and sync.node_ids() == []
    with pytest.raises(NotOpened):                          # its stream is gone with it
        sync.receive(NODE, 1, node.add_key("box-3"), 0.0)
    # a node this object never heard of: the event still goes out, so every subscriber drops it
    assert sync.unlist("node-remembered-9").events == (NodeUnlisted("node-remembered-9", False, False, 0),)


def test_node_state_is_live_and_read_only() -> None:
    sync, _, node = synced()
    state = sync.node(NODE)
    assert state.position == (1, 1) and state.synced
    send_all(sync, [node.add_key("box-2")], now=9.0)
    assert state.position == (1, 2) and state.last_applied_at == 9.0     # the same object shows the change
    with pytest.raises(AttributeError):
        state.sequence = 0                                   # type: ignore[misc]
    counters = state.counters
    counters.deltas_applied = 1000                           # a copy: the node's counters are untouched
    assert sync.node(NODE).counters.deltas_applied == 1
    before = state.frozen_copy()
    sync.close(NODE, 1, 10.0)
    assert not state.connected and not state.synced and state.position == (1, 2)
    assert before.connected and before.synced and before.counters.deltas_applied == 1   # the copy stays


def test_synced_heard_follows_every_call() -> None:
    """The freshness input (docs/coordinator.md, freshness contract (c)): a node counts only while
    its stream is open, its replica verified and no snapshot outstanding; then its time is
    when it was last heard from."""
    sink = DictReplicaSink()
    sync = CoordinatorSync(sink, CoordinatorSyncConfig(need_snapshot_retry_s=1.0))
    node = FakeNode()
    node.add_key("box-1")
    sync.open(1, node.hello(floor=1), 1.0)
    assert dict(sync.synced_heard()) == {}                   # no replica yet
    send_all(sync, node.snapshot(), now=2.0)
    assert dict(sync.synced_heard()) == {NODE: 2.0} and sync.node(NODE).synced_heard_at == 2.0
    send_all(sync, [node.add_key("box-2")], now=3.0)
    assert dict(sync.synced_heard()) == {NODE: 3.0}
    node.add_key("box-3")                                    # lost
    send_all(sync, [node.add_key("box-4")], now=4.0)         # a gap: a snapshot is outstanding
    assert dict(sync.synced_heard()) == {} and sync.node(NODE).synced_heard_at is None
    send_all(sync, node.snapshot(), now=5.0)
    assert dict(sync.synced_heard()) == {NODE: 5.0}
    sync.close(NODE, 1, 6.0)
    assert dict(sync.synced_heard()) == {}
    sync.open(2, node.hello(floor=node.sequence), 7.0)       # reconnect within history: acked, synced
    assert dict(sync.synced_heard()) == {NODE: 7.0}
    sync.unlist(NODE)
    assert dict(sync.synced_heard()) == {}
