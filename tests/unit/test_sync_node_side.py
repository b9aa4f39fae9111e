"""Unit tests of the node end of the sync protocol (NodeSync): one rule per test.

Requirement sources named beside the assertions: issue 3 (storage node) points 3, 5, 6;
docs/sync-protocol.md for the rules it derives. Filter contents are checked against an
independent computation of the hash scheme with mmh3 directly (MurmurHash3 x64 128,
Kirsch & Mitzenmacher 2006 double hashing, multiply-shift range reduction, as written in
docs/hash-scheme.md), not against the project's own hashing module.
"""

from __future__ import annotations

import mmh3
import pytest

from shardsieve.bloom import CountingBloomFilter
from shardsieve.codec import decode_delta
from shardsieve.geometry import Geometry
from shardsieve.snapshot import SnapshotAssembler
from shardsieve.sync.errors import GeometryMismatch, MalformedMessage, SequenceAhead, UnknownEpoch, WrongNodeId
from shardsieve.sync.node_side import (
    PHASE_AWAITING_VERIFY,
    PHASE_IDLE,
    PHASE_SCANNING,
    PHASE_STREAMING,
    NodeSync,
    NodeSyncConfig,
    OldFilterRetired,
    PeerSwitched,
    RebuildAbandoned,
    RebuildRequested,
    SnapshotRefused,
)
from shardsieve.v1 import filter_pb2, sync_pb2

NODE = "node-heron-2"
G = Geometry(bits=1024, hashes=4, seed=3)
G2 = Geometry(bits=2048, hashes=5, seed=3)


def reference_positions(key: str, g: Geometry) -> set[int]:
    """Positions by the published recipe, computed here from mmh3 alone."""
    digest = mmh3.mmh3_x64_128_digest(key.encode(), g.seed)
    h1 = int.from_bytes(digest[:8], "little")
    h2 = int.from_bytes(digest[8:], "little")
    return {(((h1 + i * h2) % 2**64) * g.bits) >> 64 for i in range(g.hashes)}


def reference_bits(keys: list[str], g: Geometry) -> set[int]:
    out: set[int] = set()
    for key in keys:
        out |= reference_positions(key, g)
    return out


def set_bits(bits) -> set[int]:
    return {i for i, b in enumerate(bits) if b}


def make(keys=(), config: NodeSyncConfig | None = None, epoch: int = 1, geometry: Geometry = G):
    f = CountingBloomFilter(geometry)
    for key in keys:
        f.add(key)
    sync = NodeSync(NODE, "10.0.0.7:7100", f, epoch=epoch, capacity=80, target_fpr=0.01, key_count=len(keys),
                    config=config or NodeSyncConfig(retransmit_after_s=1.0))
    return sync, f


def ack(epoch: int, sequence: int, geometry: Geometry | None = G, node_id: str = NODE) -> sync_pb2.CoordinatorMessage:
    a = sync_pb2.Ack(epoch=epoch, sequence=sequence)
    if geometry is not None:
        a.geometry.CopyFrom(geometry.to_proto())
    return sync_pb2.CoordinatorMessage(node_id=node_id, ack=a)


def need(reason=sync_pb2.SNAPSHOT_REASON_NO_REPLICA, have_epoch=0, have_sequence=0) -> sync_pb2.CoordinatorMessage:
    return sync_pb2.CoordinatorMessage(node_id=NODE, need_snapshot=sync_pb2.NeedSnapshot(
        reason=reason, have_epoch=have_epoch, have_sequence=have_sequence))


def kinds(messages) -> list[str]:
    return [m.WhichOneof("body") for m in messages]


def assemble(messages) -> tuple[filter_pb2.SnapshotChunk, object]:
    chunks = [m.snapshot_chunk for m in messages if m.WhichOneof("body") == "snapshot_chunk"]
    first = chunks[0]
    asm = SnapshotAssembler(Geometry.from_proto(first.geometry), encoding=first.encoding,
                            chunk_count=first.chunk_count, total_bytes=first.total_bytes, checksum=first.checksum)
    for c in chunks:
        asm.add(c.chunk_index, c.data)
    return first, asm.finish()


def connected(sync: NodeSync, peer: str = "coord-a", at: int = 0, epoch: int = 1) -> None:
    sync.connect(peer, 0.0)
    sync.receive(peer, ack(epoch, at, geometry=sync.geometry), 0.0)


# ----------------------------------------------------------------------------- Hello and deltas


def test_hello_carries_everything_the_coordinator_needs() -> None:
    sync, f = make(["crate-1", "crate-2"])
    (msg,) = sync.connect("coord-a", 0.0)
    h = msg.hello
    # issue 3 point 3: node id, storage address, geometry, epoch, change sequence and checksum
    assert (h.node_id, h.storage_address) == (NODE, "10.0.0.7:7100")
    assert Geometry.from_proto(h.geometry) == G
    assert (h.epoch, h.sequence, h.checksum) == (1, 0, f.checksum)
    assert (h.key_count, h.capacity, h.protocol_version, h.history_floor) == (2, 80, 1, 0)
    assert h.target_fpr == pytest.approx(0.01) and h.push_interval_ms == 50


def test_cut_sequences_changes_and_encodes_them() -> None:
    sync, f = make(["crate-1"])
    assert sync.cut(0.0) == []   # baseline: the initial contents are sequence 0, not a delta
    assert sync.pending_sequence == (1, 1)
    f.add("crate-2")
    (delta,) = sync.cut(0.1, key_count=2)
    changes = decode_delta(delta.payload, G.bits)
    # the delta sets exactly the bits crate-2 adds (reference: mmh3 directly)
    assert set(changes.set_positions.tolist()) == reference_positions("crate-2", G) - reference_positions("crate-1", G)
    assert (delta.epoch, delta.sequence, delta.checksum, delta.key_count) == (1, 1, f.checksum, 2)
    assert sync.pending_sequence == (1, 2)


def test_nothing_goes_out_before_the_hello_is_answered() -> None:
    sync, f = make()
    sync.connect("coord-a", 0.0)
    f.add("crate-9")
    sync.cut(0.0)
    assert sync.outgoing("coord-a", 0.0) == []   # the coordinator's position is unknown yet
    sync.receive("coord-a", ack(1, 0), 0.0)
    assert kinds(sync.outgoing("coord-a", 0.0)) == ["delta"]


def test_deltas_follow_the_ack_and_resend_after_the_retransmit_timer() -> None:
    sync, f = make()
    connected(sync)
    for i in range(3):
        f.add(f"crate-{i}")
        sync.cut(0.0)
    sent = sync.outgoing("coord-a", 0.0)
    assert [m.delta.sequence for m in sent] == [1, 2, 3]
    assert sync.outgoing("coord-a", 0.5) == []              # in flight, timer not expired
    sync.receive("coord-a", ack(1, 1), 0.6)                 # progress restarts the timer
    assert sync.outgoing("coord-a", 1.5) == []
    again = sync.outgoing("coord-a", 1.7)                    # no progress for 1 s: go back to the ack
    assert [m.delta.sequence for m in again] == [2, 3]      # go-back-N (common practice)


def test_max_bytes_bounds_a_batch_but_one_message_always_fits() -> None:
    sync, f = make()
    connected(sync)
    for i in range(4):
        f.add(f"crate-{i}")
        sync.cut(0.0)
    first = sync.outgoing("coord-a", 0.0, max_bytes=1)
    assert len(first) == 1                                   # never stalls on a small budget
    rest = sync.outgoing("coord-a", 0.0, max_bytes=10_000)
    assert [m.delta.sequence for m in first + rest] == [1, 2, 3, 4]


# ----------------------------------------------------------------------------- snapshots


def test_need_snapshot_sends_the_state_at_exactly_one_sequence() -> None:
    sync, f = make(["crate-1"])
    connected(sync)
    f.add("crate-2")                     # not cut yet: the snapshot must cut it first
    sync.receive("coord-a", need(sync_pb2.SNAPSHOT_REASON_GAP), 0.0)
    out = sync.outgoing("coord-a", 0.0)
    first, bloom = assemble(out)
    assert (first.epoch, first.sequence) == (1, 1) == (sync.epoch, sync.sequence)
    assert first.purpose == filter_pb2.SNAPSHOT_PURPOSE_RESYNC
    assert set_bits(bloom.bits) == reference_bits(["crate-1", "crate-2"], G)
    assert bloom.checksum == first.checksum == f.checksum


def test_history_overflow_turns_into_a_snapshot() -> None:
    sync, f = make(config=NodeSyncConfig(max_history_deltas=2))
    connected(sync)
    for i in range(5):
        f.add(f"crate-{i}")
        sync.cut(0.0)
    assert sync.history_floor == 3       # deltas 4 and 5 held: a replica at 3 or above can catch up
    out = sync.outgoing("coord-a", 0.0)  # the peer is at 0, below the floor (issue 3 point 3)
    assert kinds(out)[0] == "snapshot_chunk" and "delta" not in kinds(out)
    first, bloom = assemble(out)
    assert first.sequence == 5 and set_bits(bloom.bits) == reference_bits([f"crate-{i}" for i in range(5)], G)


def test_a_slow_peer_never_holds_back_a_fast_one() -> None:
    config = NodeSyncConfig(max_history_deltas=3, max_in_flight_bytes=100)
    sync, f = make(config=config)
    connected(sync, "fast")
    connected(sync, "slow")
    fast_seen: list[int] = []
    slow_kinds: list[str] = []
    for i in range(8):
        f.add(f"crate-{i}")
        sync.cut(0.0)
        got = sync.outgoing("fast", 0.0)
        fast_seen += [m.delta.sequence for m in got]
        if got:
            sync.receive("fast", ack(1, got[-1].delta.sequence), 0.0)
        slow_kinds += kinds(sync.outgoing("slow", 0.0))   # sent, never acknowledged
    assert fast_seen == list(range(1, 9))      # issue 3 point 3: a slow coordinator never holds back others
    assert sync.history_floor == 5             # the history stayed bounded (3 deltas) regardless of "slow"
    # "slow" filled its in-flight window, fell below the floor and was given a snapshot instead
    assert slow_kinds.count("delta") < 8 and "snapshot_chunk" in slow_kinds


def test_snapshot_confirmed_by_ack_then_deltas_continue() -> None:
    sync, f = make()
    sync.connect("coord-a", 0.0)
    sync.receive("coord-a", need(), 0.0)
    chunks = sync.outgoing("coord-a", 0.0)
    assert kinds(chunks) == ["snapshot_chunk"] * len(chunks)
    f.add("crate-7")
    sync.cut(0.0)
    assert kinds(sync.outgoing("coord-a", 0.0)) == ["delta"]   # pipelined after the snapshot
    sync.receive("coord-a", ack(1, 0), 0.0)
    assert not sync.peer_status("coord-a").snapshot_in_progress


def test_unconfirmed_snapshot_is_replaced_by_a_fresh_one() -> None:
    sync, f = make(config=NodeSyncConfig(retransmit_after_s=1.0))
    sync.connect("coord-a", 0.0)
    sync.receive("coord-a", need(), 0.0)
    first, _ = assemble(sync.outgoing("coord-a", 0.0))
    assert sync.outgoing("coord-a", 0.5) == []
    second, _ = assemble(sync.outgoing("coord-a", 1.1))
    assert second.snapshot_id > first.snapshot_id


# ----------------------------------------------------------------------------- refusals


def test_a_message_for_another_node_is_refused_and_changes_nothing() -> None:
    sync, f = make()
    connected(sync)
    f.add("crate-1")
    sync.cut(0.0)
    before = sync.peer_status("coord-a")
    with pytest.raises(WrongNodeId, match="node-otter"):   # issue 3 point 6
        sync.receive("coord-a", ack(1, 1, node_id="node-otter-1"), 0.0)
    assert sync.peer_status("coord-a") == before


@pytest.mark.parametrize("message, error", [
    (ack(7, 0), UnknownEpoch),                        # an epoch the node never had
    (ack(1, 99), SequenceAhead),                      # a sequence the node never cut
    (ack(1, 0, geometry=G2), GeometryMismatch),       # another geometry for epoch 1
    (sync_pb2.CoordinatorMessage(node_id=NODE), MalformedMessage),
    (sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(capacity=0, target_fpr=0.01)), MalformedMessage),
])
def test_impossible_coordinator_claims_are_refused(message, error) -> None:
    sync, _ = make()
    connected(sync)
    before = sync.peer_status("coord-a")
    with pytest.raises(error):                        # issue 3 point 6: specific error, state unharmed
        sync.receive("coord-a", message, 0.0)
    assert sync.peer_status("coord-a") == before


# ----------------------------------------------------------------------------- rebuild hand-over


def start_rebuild(sync: NodeSync, keys: list[str], geometry: Geometry = G2) -> CountingBloomFilter:
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(
        request_id=4, capacity=200, target_fpr=0.01, reason="saturated")), 0.0)
    events = sync.take_events()
    assert any(isinstance(e, RebuildRequested) and e.request.capacity == 200 for e in events)
    sync.start_rebuild(200, 0.01, 0.0)
    new = CountingBloomFilter(geometry)
    for key in keys:
        new.add(key)
    return new


def test_rebuild_hand_over_switches_only_after_verification() -> None:
    sync, old = make(["crate-1"])
    connected(sync)
    new = start_rebuild(sync, ["crate-1"])
    assert sync.rebuild_phase == PHASE_SCANNING and sync.dual_write
    for f in (old, new):
        f.add("crate-2")                            # dual write during the scan
    assert sync.begin_epoch(new, 200, 0.01, 0.0) == 2
    assert sync.rebuild_phase == PHASE_STREAMING
    assert sync.pending_sequence == (2, 1)          # WriteAcks name the new epoch (conservative hint)
    out = sync.outgoing("coord-a", 0.0)
    assert kinds(out)[0] == "delta" and out[0].delta.epoch == 1   # old replica brought to the split point
    first, bloom = assemble(out)
    assert first.purpose == filter_pb2.SNAPSHOT_PURPOSE_REBUILD and first.epoch == 2
    assert set_bits(bloom.bits) == reference_bits(["crate-1", "crate-2"], G2)
    assert sync.rebuild_phase == PHASE_AWAITING_VERIFY
    assert sync.old_filter is old                  # not retired before the coordinator confirms
    verified = sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_verified=sync_pb2.SnapshotVerified(
        snapshot_id=first.snapshot_id, epoch=2, sequence=first.sequence))
    sync.receive("coord-a", verified, 0.0)
    events = sync.take_events()
    assert PeerSwitched("coord-a", 2) in events and OldFilterRetired(1, 2) in events   # issue 3 point 5
    assert sync.old_filter is None and not sync.dual_write and sync.rebuild_phase == PHASE_IDLE


def test_old_epoch_deltas_stop_at_the_split_point() -> None:
    # docs/sync-protocol.md, "The rebuild hand-over" step 3: an old-epoch delta cut after the
    # rebuild snapshot must never reach that coordinator, or installing the snapshot would
    # take back a key it already routed with.
    keys = [f"crate-{i}" for i in range(30)]
    sync, old = make(keys, config=NodeSyncConfig(max_chunk_bytes=16, retransmit_after_s=1.0))
    connected(sync)
    new = start_rebuild(sync, keys)
    sync.begin_epoch(new, 200, 0.01, 0.0)
    part = sync.outgoing("coord-a", 0.0, max_bytes=1)      # the snapshot is cut; one chunk out
    assert kinds(part) == ["snapshot_chunk"] and part[0].snapshot_chunk.chunk_count > 1
    split = part[0].snapshot_chunk
    for f in (old, new):
        f.add("crate-late")
    cut = sync.cut(0.0)
    assert [d.epoch for d in cut] == [1, 2]                 # both epochs advance
    rest = sync.outgoing("coord-a", 0.0)
    assert all(m.delta.epoch == 2 for m in rest if m.WhichOneof("body") == "delta")
    assert [m.delta.sequence for m in rest if m.WhichOneof("body") == "delta"] == [split.sequence + 1]


def test_rejected_rebuild_snapshot_is_retried_then_abandoned() -> None:
    sync, old = make(["crate-1"], config=NodeSyncConfig(max_rebuild_attempts=2))
    connected(sync)
    new = start_rebuild(sync, ["crate-1"])
    sync.begin_epoch(new, 200, 0.01, 0.0)
    ids = []
    for _ in range(2):
        first, _ = assemble(sync.outgoing("coord-a", 0.0))
        ids.append(first.snapshot_id)
        sync.receive("coord-a", sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_rejected=sync_pb2.SnapshotRejected(
            snapshot_id=first.snapshot_id, detail="checksum differs")), 0.0)
    assert ids[1] > ids[0]                                     # a fresh attempt, not a replay
    events = sync.take_events()
    assert any(isinstance(e, RebuildAbandoned) and e.epoch == 2 for e in events)
    assert sync.epoch == 1 and sync.filter is old and sync.old_filter is None and not sync.dual_write
    old.add("crate-3")
    (delta,) = sync.cut(0.0)
    assert delta.epoch == 1                                    # the old epoch stays current
    assert [m.delta.sequence for m in sync.outgoing("coord-a", 0.0)] == [1]
    assert sync.highest_epoch == 2                             # the abandoned number is never reused


def test_rejection_after_another_peer_switched_resets_that_stream() -> None:
    sync, old = make(["crate-1"], config=NodeSyncConfig(max_rebuild_attempts=1))
    connected(sync, "coord-a")
    connected(sync, "coord-b")
    new = start_rebuild(sync, ["crate-1"])
    sync.begin_epoch(new, 200, 0.01, 0.0)
    a, _ = assemble(sync.outgoing("coord-a", 0.0))
    b, _ = assemble(sync.outgoing("coord-b", 0.0))
    sync.receive("coord-a", ack(2, a.sequence, geometry=G2), 0.0)      # coord-a switched
    assert sync.old_filter is old                                     # coord-b has not
    with pytest.raises(SnapshotRefused):
        sync.receive("coord-b", sync_pb2.CoordinatorMessage(snapshot_rejected=sync_pb2.SnapshotRejected(
            snapshot_id=b.snapshot_id, detail="too large")), 0.0)
    sync.disconnect("coord-b")                                        # the driver resets that stream
    assert any(isinstance(e, OldFilterRetired) for e in sync.take_events())


def test_a_peer_connecting_during_the_hand_over_gets_the_new_epoch() -> None:
    sync, old = make(["crate-1"])
    connected(sync, "coord-a")
    new = start_rebuild(sync, ["crate-1"])
    sync.begin_epoch(new, 200, 0.01, 0.0)
    (hello,) = sync.connect("coord-b", 0.0)
    assert hello.hello.epoch == 2 and Geometry.from_proto(hello.hello.geometry) == G2
    sync.receive("coord-b", need(sync_pb2.SNAPSHOT_REASON_UNKNOWN_EPOCH, 1, 0), 0.0)
    first, _ = assemble(sync.outgoing("coord-b", 0.0))
    assert first.epoch == 2 and first.purpose == filter_pb2.SNAPSHOT_PURPOSE_REBUILD


def test_rebuild_requests_during_a_rebuild_are_ignored() -> None:
    sync, _ = make()
    connected(sync)
    start_rebuild(sync, [])
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(
        request_id=5, capacity=300, target_fpr=0.01)), 0.0)
    assert not any(isinstance(e, RebuildRequested) for e in sync.take_events())


def test_heartbeat_fills_the_sync_owned_stats() -> None:
    sync, f = make(["crate-1", "crate-2"])
    connected(sync)
    msg = sync.heartbeat(sync_pb2.NodeStats(reads=10, reads_missed=3, writes=2))
    s = msg.heartbeat.stats
    assert (s.reads, s.reads_missed, s.writes) == (10, 3, 2)
    assert (s.epoch, s.sequence, s.capacity, s.key_count) == (1, 0, 80, 2)
    set_count = len(reference_bits(["crate-1", "crate-2"], G))
    assert s.fill == pytest.approx(set_count / G.bits)
    assert s.predicted_fpr == pytest.approx((set_count / G.bits) ** G.hashes)   # fill^k (ARCHITECTURE.md words)
    assert s.rebuild_phase == PHASE_IDLE and s.rebuild_progress == 0.0
