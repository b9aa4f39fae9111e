"""Unit tests of the node end of the sync protocol (NodeSync): one rule per test.

Rules come from docs/sync-protocol.md (named beside the assertions) and the promises of
docs/architecture.md. Filter contents are checked against an independent computation of
the hash scheme with mmh3 directly (MurmurHash3 x64 128, Kirsch & Mitzenmacher 2006 double
hashing, multiply-shift range reduction, as written in docs/hash-scheme.md), not against
the project's own hashing module; counters against the definition of a counting Bloom
filter (Fan, Cao, Almeida & Broder, "Summary Cache", IEEE/ACM ToN 2000, section V.C: one
counter per bit, incremented per inserted key, decremented per deleted key).
"""

from __future__ import annotations

import random

import mmh3
import pytest

from shardsieve.bloom import CountingBloomFilter
from shardsieve.codec import decode_delta
from shardsieve.geometry import Geometry, geometry_for
from shardsieve.snapshot import SnapshotAssembler
from shardsieve.sync.bounds import MAX_EPOCH
from shardsieve.sync.errors import (
    GeometryMismatch,
    MalformedMessage,
    RebuildStateError,
    SequenceAhead,
    UnknownEpoch,
    WrongNodeId,
)
from shardsieve.sync.node_side import (
    SEND_BUDGET_BYTES,
    Durable,
    LogLine,
    NodeSync,
    NodeSyncConfig,
    RebuildPhase,
    Ready,
    SnapshotRefused,
    StaleReady,
    StartScan,
    StoreCounters,
)
from shardsieve.v1 import filter_pb2, sync_pb2

NODE = "node-heron-2"
G = Geometry(bits=1024, hashes=4, seed=3)
G_OTHER = Geometry(bits=2048, hashes=5, seed=3)
G2 = geometry_for(200, 0.01, seed=3)     # what a rebuild to capacity 200 at 1 % builds (same seed)


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


def reference_counters(keys: list[str], g: Geometry) -> list[int]:
    """One counter per bit, +1 per key whose positions include it (no saturation at this size)."""
    counts = [0] * g.bits
    for key in keys:
        for p in reference_positions(key, g):
            counts[p] += 1
    return counts


def set_bits(bits) -> set[int]:
    return {i for i, b in enumerate(bits) if b}


def b(*keys: str) -> list[bytes]:
    return [k.encode() for k in keys]


def make(keys=(), config: NodeSyncConfig | None = None, epoch: int = 1, geometry: Geometry = G):
    f = CountingBloomFilter(geometry)
    for key in keys:
        f.add(key)
    sync = NodeSync(NODE, "10.0.0.7:7100", f, epoch=epoch, capacity=80, target_fpr=0.01, key_count=len(keys),
                    config=config or NodeSyncConfig(retransmit_after_s=1.0))
    return sync


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


def settle(sync: NodeSync, now: float = 0.0, budgets: dict[str, int] | None = None) -> Ready:
    """Take what is ready and acknowledge it, as a driver does after carrying it out."""
    ready = sync.ready(now, budgets or {})
    sync.ack(ready)
    return ready


def drain(sync: NodeSync, peer: str = "coord-a", now: float = 0.0, max_bytes: int = SEND_BUDGET_BYTES) -> list:
    """The messages ready for one peer, given max_bytes of room."""
    return list(settle(sync, now, {peer: max_bytes}).messages.get(peer, ()))


def logged(ready: Ready) -> list[str]:
    return [a.message for a in ready.actions if isinstance(a, LogLine)]


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
    assert kinds(drain(sync, peer, max_bytes=0)) == ["hello"]
    sync.receive(peer, ack(epoch, at, geometry=sync.geometry), 0.0)


def write_and_cut(sync: NodeSync, *keys: str) -> None:
    for key in keys:
        sync.record(b(key))
        sync.cut()


# ----------------------------------------------------------------------------- Hello and deltas


def test_hello_carries_everything_the_coordinator_needs() -> None:
    sync = make(["crate-1", "crate-2"])
    sync.connect("coord-a", 0.0)
    (msg,) = drain(sync)
    h = msg.hello
    # docs/sync-protocol.md, "Message flow": node id, address, geometry, epoch, sequence, checksum, floor
    assert (h.node_id, h.storage_address) == (NODE, "10.0.0.7:7100")
    assert Geometry.from_proto(h.geometry) == G
    assert (h.epoch, h.sequence, h.checksum) == (1, 0, sync.filter.checksum)
    assert (h.key_count, h.capacity, h.protocol_version, h.history_floor) == (2, 80, 1, 0)
    assert h.target_fpr == pytest.approx(0.01) and h.push_interval_ms == 50


def test_cut_sequences_changes_and_encodes_them() -> None:
    sync = make(["crate-1"])
    connected(sync)
    assert sync.cut() == []   # baseline: the initial contents are sequence 0, not a delta
    stamp = sync.record(b("crate-2"))
    assert (stamp.epoch, stamp.sequence, stamp.old_position) == (1, 1, None)   # the next delta carries it
    assert sync.cut() == [(1, 1)]
    (msg,) = drain(sync)
    delta = msg.delta
    changes = decode_delta(delta.payload, G.bits)
    # the delta sets exactly the bits crate-2 adds (reference: mmh3 directly)
    assert set(changes.set_positions.tolist()) == reference_positions("crate-2", G) - reference_positions("crate-1", G)
    assert (delta.epoch, delta.sequence, delta.checksum, delta.key_count) == (1, 1, sync.filter.checksum, 2)
    assert sync.record(b("crate-3")).sequence == 2


def test_a_write_that_changes_no_bit_names_the_last_cut() -> None:
    # WriteStamp rule (docs/sync-protocol.md, "Why the promises hold", promise 2): naming a
    # delta that may never be cut would hold a read-your-writes hint forever.
    sync = make(["crate-1"])
    sync.record(b("crate-2"))
    sync.cut()
    again = sync.record()                                  # an overwrite: no key added or removed
    assert (again.epoch, again.sequence) == (1, 1) and sync.cut() == []
    gone = sync.record(removed=b("crate-2"))
    assert gone.sequence == 2 and gone.cut_due is False
    assert sync.key_count == 1


def test_cut_is_due_once_about_the_threshold_of_bits_changed() -> None:
    sync = make(config=NodeSyncConfig(cut_after_bits=10))   # k = 4: three keys pass 10 bits
    assert [sync.record(b(f"crate-{i}")).cut_due for i in range(3)] == [False, False, True]
    sync.cut()
    assert sync.record(b("crate-9")).cut_due is False       # the cut started the count over


def test_nothing_goes_out_before_the_hello_is_answered() -> None:
    sync = make()
    sync.connect("coord-a", 0.0)
    write_and_cut(sync, "crate-9")
    assert kinds(drain(sync)) == ["hello"]   # the coordinator's position is unknown yet
    assert drain(sync) == []
    sync.receive("coord-a", ack(1, 0), 0.0)
    assert kinds(drain(sync)) == ["delta"]


def test_deltas_follow_the_ack_and_resend_after_the_retransmit_timer() -> None:
    sync = make()
    connected(sync)
    write_and_cut(sync, "crate-0", "crate-1", "crate-2")
    sent = drain(sync, now=0.0)
    assert [m.delta.sequence for m in sent] == [1, 2, 3]
    assert drain(sync, now=0.5) == []                       # in flight, timer not expired
    sync.receive("coord-a", ack(1, 1), 0.6)                 # progress restarts the timer
    assert drain(sync, now=1.5) == []
    again = drain(sync, now=1.7)                            # no progress for 1 s: go back to the ack
    assert [m.delta.sequence for m in again] == [2, 3]      # go-back-N (common practice)


def test_the_budget_bounds_a_batch_but_one_message_always_fits() -> None:
    sync = make()
    connected(sync)
    write_and_cut(sync, "crate-0", "crate-1", "crate-2", "crate-3")
    assert drain(sync, max_bytes=0) == []                    # no room: nothing is pulled
    first = drain(sync, max_bytes=1)
    assert len(first) == 1                                   # never stalls on a small budget
    rest = drain(sync, max_bytes=10_000)
    assert [m.delta.sequence for m in first + rest] == [1, 2, 3, 4]


# ----------------------------------------------------------------------------- snapshots


def test_need_snapshot_sends_the_state_at_exactly_one_sequence() -> None:
    sync = make(["crate-1"])
    connected(sync)
    sync.record(b("crate-2"))            # not cut yet: the snapshot must cut it first
    sync.receive("coord-a", need(sync_pb2.SNAPSHOT_REASON_GAP), 0.0)
    ready = settle(sync, budgets={"coord-a": SEND_BUDGET_BYTES})
    first, bloom = assemble(ready.messages["coord-a"])
    assert (first.epoch, first.sequence) == (1, 1) == (sync.epoch, sync.sequence)
    assert first.purpose == filter_pb2.SNAPSHOT_PURPOSE_RESYNC
    assert set_bits(bloom.bits) == reference_bits(["crate-1", "crate-2"], G)
    assert bloom.checksum == first.checksum == sync.filter.checksum
    assert logged(ready) == ["snapshot cut"]


def test_history_overflow_turns_into_a_snapshot() -> None:
    sync = make(config=NodeSyncConfig(max_history_deltas=2))
    connected(sync)
    write_and_cut(sync, *[f"crate-{i}" for i in range(5)])
    assert sync.history_floor == 3       # deltas 4 and 5 held: a replica at 3 or above can catch up
    out = drain(sync)                    # the peer is at 0, below the floor
    assert kinds(out)[0] == "snapshot_chunk" and "delta" not in kinds(out)
    first, bloom = assemble(out)
    assert first.sequence == 5 and set_bits(bloom.bits) == reference_bits([f"crate-{i}" for i in range(5)], G)


def test_a_slow_peer_never_holds_back_a_fast_one() -> None:
    config = NodeSyncConfig(max_history_deltas=3, max_in_flight_bytes=100)
    sync = make(config=config)
    connected(sync, "fast")
    connected(sync, "slow")
    fast_seen: list[int] = []
    slow_kinds: list[str] = []
    for i in range(8):
        write_and_cut(sync, f"crate-{i}")
        got = drain(sync, "fast")
        fast_seen += [m.delta.sequence for m in got]
        if got:
            sync.receive("fast", ack(1, got[-1].delta.sequence), 0.0)
        slow_kinds += kinds(drain(sync, "slow"))   # sent, never acknowledged
    # docs/architecture.md#3-bounded-staleness: a slow coordinator never holds back others
    assert fast_seen == list(range(1, 9))
    assert sync.history_floor == 5             # the history stayed bounded (3 deltas) regardless of "slow"
    # "slow" filled its in-flight window, fell below the floor and was given a snapshot instead
    assert slow_kinds.count("delta") < 8 and "snapshot_chunk" in slow_kinds


def test_snapshot_confirmed_by_ack_then_deltas_continue() -> None:
    sync = make()
    sync.connect("coord-a", 0.0)
    sync.receive("coord-a", need(), 0.0)
    chunks = drain(sync)
    assert kinds(chunks) == ["hello"] + ["snapshot_chunk"] * (len(chunks) - 1)
    write_and_cut(sync, "crate-7")
    assert kinds(drain(sync)) == ["delta"]   # pipelined after the snapshot
    sync.receive("coord-a", ack(1, 0), 0.0)
    assert not sync.peer_status("coord-a").snapshot_in_progress


def test_unconfirmed_snapshot_is_replaced_by_a_fresh_one() -> None:
    sync = make(config=NodeSyncConfig(retransmit_after_s=1.0))
    sync.connect("coord-a", 0.0)
    sync.receive("coord-a", need(), 0.0)
    first, _ = assemble(drain(sync, now=0.0))
    assert drain(sync, now=0.5) == []
    second, _ = assemble(drain(sync, now=1.1))
    assert second.snapshot_id > first.snapshot_id


# ----------------------------------------------------------------------------- refusals


def test_a_start_past_the_largest_epoch_is_refused() -> None:
    # docs/sync-protocol.md, "Positions that cannot follow": coordinators refuse epochs above
    # MAX_EPOCH, so a node must not start there (a corrupt persisted epoch, say)
    assert make(epoch=MAX_EPOCH).epoch == MAX_EPOCH
    with pytest.raises(ValueError, match="largest a position may carry"):
        make(epoch=MAX_EPOCH + 1)


def test_a_message_for_another_node_is_refused_and_changes_nothing() -> None:
    sync = make()
    connected(sync)
    write_and_cut(sync, "crate-1")
    before = sync.peer_status("coord-a")
    # docs/architecture.md#5-bad-input-changes-nothing
    with pytest.raises(WrongNodeId, match="node-otter"):
        sync.receive("coord-a", ack(1, 1, node_id="node-otter-1"), 0.0)
    assert sync.peer_status("coord-a") == before


@pytest.mark.parametrize("message, error", [
    (ack(7, 0), UnknownEpoch),                        # an epoch the node never had
    (ack(1, 99), SequenceAhead),                      # a sequence the node never cut
    (ack(1, 0, geometry=G_OTHER), GeometryMismatch),  # another geometry for epoch 1
    (sync_pb2.CoordinatorMessage(node_id=NODE), MalformedMessage),
    (sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(capacity=0, target_fpr=0.01)), MalformedMessage),
    # a size no supported geometry holds (m would pass the ladder's top)
    (sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(capacity=1 << 60, target_fpr=1e-9)),
     MalformedMessage),
])
def test_impossible_coordinator_claims_are_refused(message, error) -> None:
    sync = make()
    connected(sync)
    before = sync.peer_status("coord-a")
    # docs/architecture.md#5-bad-input-changes-nothing: specific error, state unharmed
    with pytest.raises(error):
        sync.receive("coord-a", message, 0.0)
    assert sync.peer_status("coord-a") == before
    assert sync.rebuild_phase is RebuildPhase.IDLE and settle(sync).empty


# ----------------------------------------------------------------------------- ready and ack


def test_durable_writes_and_actions_stay_pending_until_acknowledged() -> None:
    sync = make(["crate-1"])
    connected(sync)
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(
        request_id=4, capacity=200, target_fpr=0.01, reason="saturated")), 0.0)
    first = sync.ready(0.0, {})                     # not acknowledged (say the driver failed)
    assert StartScan(capacity=200, target_fpr=0.01, keys=1) in first.actions
    second = sync.ready(0.0, {})
    assert second.actions == first.actions          # still pending: nothing is lost
    with pytest.raises(StaleReady):
        sync.ack(first)                             # only the last Ready can be acknowledged
    sync.ack(second)
    assert settle(sync).empty


def test_a_scan_that_ends_asks_for_the_new_epoch_to_be_durable_before_its_messages() -> None:
    sync = make(["crate-1"])
    connected(sync)
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    ready = settle(sync, budgets={"coord-a": SEND_BUDGET_BYTES})
    assert ready.durable == Durable(highest_epoch=2)
    assert any(m.snapshot_chunk.epoch == 2 for m in ready.messages["coord-a"] if m.HasField("snapshot_chunk"))


# ----------------------------------------------------------------------------- rebuild


def start_rebuild(sync: NodeSync, scanned: list[str]) -> Ready:
    """A coordinator asks for a rebuild; the scan hands `scanned` (the whole store) over."""
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(
        request_id=4, capacity=200, target_fpr=0.01, reason="saturated")), 0.0)
    ready = settle(sync)
    assert StartScan(capacity=200, target_fpr=0.01, keys=sync.key_count) in ready.actions
    assert logged(ready) == ["rebuild started"]
    assert sync.rebuild_phase is RebuildPhase.SCANNING
    if scanned:
        sync.scan_batch(sorted(b(*scanned)))
    return ready


def test_writes_during_the_scan_reach_the_new_filter_only_for_keys_the_scan_passed() -> None:
    # docs/sync-protocol.md, "The rebuild hand-over" step 1: a key above the cursor is left to
    # the scan (counting it twice would pin its counters; uncounting it before the scan read
    # it would underflow them). The new filter must end up exactly the counting filter of the
    # final key set.
    rng = random.Random(17)
    store = {f"crate-{i:03d}" for i in range(60)}
    sync = make(sorted(store), geometry=G)
    sync.request_rebuild(200, 0.01, reason="test", requested_by="local", now=0.0)
    cursor: str | None = None
    while True:
        for _ in range(rng.randrange(1, 4)):      # writes anywhere in the key space
            key = f"crate-{rng.randrange(90):03d}"
            if key in store:
                store.discard(key)
                sync.record(removed=b(key))
            else:
                store.add(key)
                sync.record(added=b(key))
        batch = sorted(k for k in store if cursor is None or k > cursor)[:rng.randrange(1, 9)]
        if not batch:
            break
        sync.scan_batch(b(*batch))
        cursor = batch[-1]
    assert sync.rebuild_phase is RebuildPhase.SCANNING and sync.epoch == 1
    sync.scan_done(5.0)
    # no coordinator connected: the hand-over completes at once
    assert sync.rebuild_phase is RebuildPhase.IDLE and sync.epoch == 2 and sync.geometry == G2
    f = sync.filter
    assert [f.counter(p) for p in range(G2.bits)] == reference_counters(sorted(store), G2)
    assert sync.key_count == len(store)
    ready = settle(sync)
    assert ready.durable == Durable(highest_epoch=2, rebuilt_size=(200, 0.01))
    assert logged(ready) == ["rebuild started", "rebuild scan complete, streaming the new filter",
                             "rebuild complete, old filter retired"]
    (done,) = [a for a in ready.actions if isinstance(a, LogLine) and a.message.startswith("rebuild scan")]
    assert done.fields["seconds"] == 5.0


def test_rebuild_hand_over_switches_only_after_verification() -> None:
    sync = make(["crate-1"])
    connected(sync)
    start_rebuild(sync, ["crate-1"])
    phases = [sync.rebuild_phase]
    sync.record(b("crate-2"))                       # above the cursor (crate-1): left to the scan...
    sync.scan_batch(b("crate-2"))                   # ...which reads it next
    sync.scan_done(0.0)
    phases.append(sync.rebuild_phase)
    stamp = sync.record(b("crate-3"))               # both epochs are written during the hand-over
    assert (stamp.epoch, stamp.sequence) == (2, 1)  # WriteAcks name the new epoch (conservative hint)
    assert stamp.old_position == (1, 2)             # ...and the old epoch's position that holds it
    out = drain(sync)
    assert kinds(out)[0] == "delta" and out[0].delta.epoch == 1   # old replica brought to the split point
    first, bloom = assemble(out)
    assert first.purpose == filter_pb2.SNAPSHOT_PURPOSE_REBUILD and first.epoch == 2
    assert set_bits(bloom.bits) == reference_bits(["crate-1", "crate-2", "crate-3"], G2)
    phases.append(sync.rebuild_phase)
    assert sync.record().old_position is not None   # not retired before the coordinator confirms
    verified = sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_verified=sync_pb2.SnapshotVerified(
        snapshot_id=first.snapshot_id, epoch=2, sequence=first.sequence))
    sync.receive("coord-a", verified, 0.0)
    phases.append(sync.rebuild_phase)
    # docs/sync-protocol.md, "States": scanning -> streaming -> awaiting-verify -> idle
    assert phases == [RebuildPhase.SCANNING, RebuildPhase.STREAMING, RebuildPhase.AWAITING_VERIFY, RebuildPhase.IDLE]
    ready = settle(sync)
    assert "coordinator switched to the rebuilt filter" in logged(ready)
    assert "rebuild complete, old filter retired" in logged(ready)
    assert ready.durable == Durable(rebuilt_size=(200, 0.01))   # a restart keeps the size (the epoch went earlier)
    assert sync.record(b("crate-4")).old_position is None                      # one filter again
    assert sync.report(StoreCounters()).rebuilds_completed == 1


def test_a_hand_over_no_coordinator_verified_never_retires_the_old_filter() -> None:
    # docs/node.md, "Rebuild": the old filter serves until a coordinator verified the new one.
    # Its only coordinator goes away (or refuses the stream) before verifying: the old filter
    # stays, and no new size is made durable, so a restart comes back at the old size.
    sync = make(["crate-1"])
    connected(sync)
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    drain(sync)
    sync.disconnect("coord-a")
    ready = settle(sync)
    assert "rebuild complete, old filter retired" not in logged(ready)
    assert ready.durable is None or ready.durable.rebuilt_size is None
    assert sync.record(b("crate-2")).old_position is not None           # both filters still written
    assert sync.rebuild_phase is not RebuildPhase.IDLE


def test_a_refused_filter_size_gives_the_rebuild_up_and_comes_back_at_the_old_size() -> None:
    # A coordinator whose max-filter-bits is below the new filter ends the stream with that
    # setting in its trailing metadata (shardsieve/limits.py); with no coordinator having taken
    # the new filter, the node gives it up: the old filter goes on under a fresh epoch and the
    # next Hello carries the old geometry, which that coordinator accepts.
    sync = make(["crate-1"])
    old_checksum = sync.filter.checksum
    connected(sync)
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    drain(sync)
    sync.disconnect("coord-a")
    sync.refused("coord-a", "max-filter-bits")
    ready = settle(sync)
    assert "rebuild abandoned" in logged(ready) and ready.durable == Durable(highest_epoch=3)
    assert sync.rebuild_phase is RebuildPhase.IDLE and sync.epoch == 3
    assert sync.geometry == G and sync.filter.checksum == old_checksum
    sync.connect("coord-a", 1.0)
    (hello,) = drain(sync, max_bytes=0)
    assert hello.hello.epoch == 3 and hello.hello.geometry.bits == G.bits


def test_a_refused_filter_outside_a_hand_over_changes_nothing_and_says_what_to_do() -> None:
    sync = make(["crate-1"])
    connected(sync)
    before = (sync.epoch, sync.geometry, sync.filter.checksum)
    sync.refused("coord-a", "max-filter-bits")
    ready = settle(sync)
    assert "a coordinator refuses this node's filter" in logged(ready)
    assert (sync.epoch, sync.geometry, sync.filter.checksum) == before


def test_old_epoch_deltas_stop_at_the_split_point() -> None:
    # docs/sync-protocol.md, "The rebuild hand-over" step 3: an old-epoch delta cut after the
    # rebuild snapshot must never reach that coordinator, or installing the snapshot would
    # take back a key it already routed with.
    keys = [f"crate-{i}" for i in range(30)]
    sync = make(keys, config=NodeSyncConfig(max_chunk_bytes=16, retransmit_after_s=1.0))
    connected(sync)
    start_rebuild(sync, keys)
    sync.scan_done(0.0)
    part = drain(sync, max_bytes=1)                          # the snapshot is cut; one chunk out
    assert kinds(part) == ["snapshot_chunk"] and part[0].snapshot_chunk.chunk_count > 1
    split = part[0].snapshot_chunk
    sync.record(b("crate-late"))
    assert [epoch for epoch, _ in sync.cut()] == [1, 2]     # both epochs advance
    rest = drain(sync)
    assert all(m.delta.epoch == 2 for m in rest if m.WhichOneof("body") == "delta")
    assert [m.delta.sequence for m in rest if m.WhichOneof("body") == "delta"] == [split.sequence + 1]


def test_rejected_rebuild_snapshot_is_retried_then_abandoned() -> None:
    sync = make(["crate-1"], config=NodeSyncConfig(max_rebuild_attempts=2))
    old_checksum = sync.filter.checksum
    connected(sync)
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    ids = []
    for _ in range(2):
        first, _ = assemble(drain(sync))
        ids.append(first.snapshot_id)
        sync.receive("coord-a", sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_rejected=sync_pb2.SnapshotRejected(
            snapshot_id=first.snapshot_id, detail="checksum differs")), 0.0)
    assert ids[1] > ids[0]                                     # a fresh attempt, not a replay
    ready = settle(sync)
    # docs/sync-protocol.md, "The rebuild hand-over" step 6: the old filter goes on under a
    # fresh epoch (highest used + 1 = 3), durable before any message names it
    assert "rebuild abandoned" in logged(ready) and ready.durable == Durable(highest_epoch=3)
    assert sync.rebuild_phase is RebuildPhase.IDLE
    assert sync.epoch == 3 and sync.sequence == 0 and sync.highest_epoch == 3
    assert sync.geometry == G and sync.filter.checksum == old_checksum
    stamp = sync.record(b("crate-3"))
    assert (stamp.epoch, stamp.sequence) == (3, 1) and stamp.old_position is None   # one filter again
    assert sync.cut() == [(3, 1)]
    out = drain(sync)                                           # the peer resyncs to the fresh epoch
    first, bloom = assemble(out)
    assert first.purpose == filter_pb2.SNAPSHOT_PURPOSE_RESYNC and (first.epoch, first.sequence) == (3, 1)
    assert set_bits(bloom.bits) == reference_bits(["crate-1", "crate-3"], G)
    assert sync.report(StoreCounters()).rebuilds_abandoned == 1


def test_after_an_abandoned_hand_over_nothing_sent_is_older_than_before() -> None:
    # docs/sync-protocol.md, "Positions that cannot follow": a coordinator refuses a snapshot
    # or delta of an epoch older than its replica. coord-b installed the new epoch but its
    # confirmation was lost; coord-a refused the rebuild, so the node abandons it. What the
    # node sends each peer afterwards must never name an epoch below one it sent that peer.
    sync = make(["crate-1"], config=NodeSyncConfig(max_rebuild_attempts=1))
    connected(sync, "coord-a")
    connected(sync, "coord-b")
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    sent = {peer: drain(sync, peer) for peer in ("coord-a", "coord-b")}
    highest_sent = {peer: max(_epochs(messages)) for peer, messages in sent.items()}
    assert highest_sent == {"coord-a": 2, "coord-b": 2}
    a_first, _ = assemble(sent["coord-a"])
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_rejected=sync_pb2.SnapshotRejected(
        snapshot_id=a_first.snapshot_id, detail="too large")), 0.0)   # its only attempt: abandoned
    assert sync.rebuild_phase is RebuildPhase.IDLE and sync.epoch == 3
    sync.receive("coord-b", ack(2, 0, geometry=G2), 0.0)       # coord-b's late ack of the abandoned epoch
    sync.record(b("crate-4"))
    sync.cut()
    for peer in ("coord-a", "coord-b"):
        later = drain(sync, peer)
        assert later and min(_epochs(later)) >= highest_sent[peer] and set(_epochs(later)) == {3}


def test_a_coordinator_that_took_the_abandoned_epoch_follows_the_fresh_one_and_keeps_its_hints() -> None:
    # A real CoordinatorSync installs the rebuild snapshot; its SnapshotVerified and Ack are
    # lost, the node gives the rebuild up. The coordinator must end with the node's exact filter
    # (it refuses anything older than epoch 2, so only the fresh epoch 3 can get it there), and a
    # write acknowledged during the hand-over is covered by the read-your-writes rule
    # (docs/sync-protocol.md, "Read-your-writes") once the replica holds it.
    from shardsieve.sync.coordinator_side import CoordinatorSync, DictReplicaSink

    sink = DictReplicaSink()
    coordinator = CoordinatorSync(sink)
    sync = make(["crate-1"], config=NodeSyncConfig(max_rebuild_attempts=1))

    def deliver(messages, drop_replies: bool = False) -> None:
        for m in messages:
            body = m.WhichOneof("body")
            replies = (coordinator.open(1, m.hello, 0.0) if body == "hello"
                       else coordinator.receive(NODE, 1, m, 0.0)).replies
            if not drop_replies:
                for reply in replies:
                    sync.receive("coord-a", reply, 0.0)

    sync.connect("coord-a", 0.0)
    for _ in range(3):
        deliver(drain(sync))
    assert coordinator.position(NODE) == (1, 0)
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    stamp = sync.record(b("crate-2"))                 # acknowledged during the hand-over
    assert stamp.epoch == 2 and stamp.old_position is not None
    deliver(drain(sync), drop_replies=True)           # installed; the confirmation is lost
    assert coordinator.position(NODE)[0] == 2         # type: ignore[index]
    resent, _ = assemble(drain(sync, now=5.0))       # unconfirmed: cut afresh after the retransmit time...
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_rejected=sync_pb2.SnapshotRejected(
        snapshot_id=resent.snapshot_id, detail="refused by the test")), 5.0)   # ...refused: abandoned
    assert sync.epoch == 3
    for _ in range(3):
        deliver(drain(sync, now=5.0))
    assert coordinator.position(NODE) == (3, sync.sequence)
    assert sink.replicas[NODE].bits == sync.filter.bits
    assert set_bits(sink.replicas[NODE].bits) == reference_bits(["crate-1", "crate-2"], G)
    assert coordinator.covers(NODE, stamp.epoch, stamp.sequence, stamp.old_position)
    late = sync.record(b("crate-9"))                  # a write after the abandon: epoch 3 only
    assert (late.epoch, late.old_position) == (3, None)
    assert not coordinator.covers(NODE, late.epoch, late.sequence)
    sync.cut()
    deliver(drain(sync, now=5.0))
    assert coordinator.covers(NODE, late.epoch, late.sequence)


def _epochs(messages) -> list[int]:
    """The epoch every delta and snapshot chunk in messages names."""
    out = []
    for m in messages:
        body = m.WhichOneof("body")
        if body == "delta":
            out.append(m.delta.epoch)
        elif body == "snapshot_chunk":
            out.append(m.snapshot_chunk.epoch)
    return out


def test_a_failed_scan_abandons_the_rebuild_and_burns_its_epoch() -> None:
    sync = make(["crate-1"])
    connected(sync)
    start_rebuild(sync, ["crate-1"])
    sync.scan_failed("store read error")
    ready = settle(sync)
    assert ready.durable == Durable(highest_epoch=2) and logged(ready) == ["rebuild abandoned"]
    assert sync.rebuild_phase is RebuildPhase.IDLE and sync.epoch == 1
    assert sync.record(b("crate-2")).old_position is None      # no filter but the current one is written
    start_rebuild(sync, ["crate-1", "crate-2"])                # a later rebuild gets a fresh number
    sync.scan_done(0.0)
    assert sync.epoch == 3


@pytest.mark.parametrize("call", [
    lambda s: s.scan_batch(b("crate-1")),
    lambda s: s.scan_done(0.0),
    lambda s: s.scan_failed("late"),
])
def test_scan_calls_without_a_running_scan_are_refused(call) -> None:
    sync = make(["crate-1"])
    connected(sync)
    with pytest.raises(RebuildStateError):
        call(sync)                                             # idle
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    assert sync.rebuild_phase is RebuildPhase.STREAMING
    with pytest.raises(RebuildStateError):
        call(sync)                                             # the scan is over
    assert sync.rebuild_phase is RebuildPhase.STREAMING and sync.epoch == 2


def test_scan_keys_out_of_order_are_refused_and_change_nothing() -> None:
    sync = make(["crate-1", "crate-2"])
    connected(sync)
    start_rebuild(sync, ["crate-2"])
    for bad in (b("crate-1"), b("crate-2"), b("crate-4", "crate-3")):    # below, at, or not ascending
        with pytest.raises(ValueError, match="ascending"):
            sync.scan_batch(bad)
    sync.scan_batch(b("crate-3"))                                       # the cursor did not move
    sync.scan_done(0.0)
    f = sync.filter
    assert [f.counter(p) for p in range(G2.bits)] == reference_counters(["crate-2", "crate-3"], G2)


def test_rejection_after_another_peer_switched_resets_that_stream() -> None:
    sync = make(["crate-1"], config=NodeSyncConfig(max_rebuild_attempts=1))
    connected(sync, "coord-a")
    connected(sync, "coord-b")
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    a, _ = assemble(drain(sync, "coord-a"))
    b_first, _ = assemble(drain(sync, "coord-b"))
    sync.receive("coord-a", ack(2, a.sequence, geometry=G2), 0.0)      # coord-a switched
    assert sync.record().old_position is not None                     # coord-b has not
    with pytest.raises(SnapshotRefused):
        sync.receive("coord-b", sync_pb2.CoordinatorMessage(snapshot_rejected=sync_pb2.SnapshotRejected(
            snapshot_id=b_first.snapshot_id, detail="too large")), 0.0)
    sync.disconnect("coord-b")                                        # the driver resets that stream
    assert "rebuild complete, old filter retired" in logged(settle(sync))


def test_a_peer_connecting_during_the_hand_over_gets_the_new_epoch() -> None:
    sync = make(["crate-1"])
    connected(sync, "coord-a")
    start_rebuild(sync, ["crate-1"])
    sync.scan_done(0.0)
    sync.connect("coord-b", 0.0)
    (hello,) = drain(sync, "coord-b", max_bytes=0)
    assert hello.hello.epoch == 2 and Geometry.from_proto(hello.hello.geometry) == G2
    sync.receive("coord-b", need(sync_pb2.SNAPSHOT_REASON_UNKNOWN_EPOCH, 1, 0), 0.0)
    first, _ = assemble(drain(sync, "coord-b"))
    assert first.epoch == 2 and first.purpose == filter_pb2.SNAPSHOT_PURPOSE_REBUILD


def test_rebuild_requests_during_a_rebuild_are_ignored() -> None:
    sync = make()
    connected(sync)
    start_rebuild(sync, [])
    sync.receive("coord-a", sync_pb2.CoordinatorMessage(rebuild=sync_pb2.RebuildRequest(
        request_id=5, capacity=300, target_fpr=0.01)), 0.0)
    assert settle(sync).empty and sync.rebuild_phase is RebuildPhase.SCANNING


def test_heartbeat_fills_the_sync_owned_stats() -> None:
    sync = make(["crate-1", "crate-2"])
    connected(sync)
    sync.heartbeat("coord-a", StoreCounters(reads=10, reads_missed=3, writes=2))
    (msg,) = drain(sync, max_bytes=0)
    s = msg.heartbeat.stats
    assert (s.reads, s.reads_missed, s.writes) == (10, 3, 2)
    assert (s.epoch, s.sequence, s.capacity, s.key_count) == (1, 0, 80, 2)
    set_count = len(reference_bits(["crate-1", "crate-2"], G))
    assert s.fill == pytest.approx(set_count / G.bits)
    # predicted FPR is fill^k (docs/architecture.md#words; Bloom 1970)
    assert s.predicted_fpr == pytest.approx((set_count / G.bits) ** G.hashes)
    assert s.rebuild_phase == "" and s.rebuild_progress == 0.0 and s.saturated_counters == 0
    assert s == sync.report(StoreCounters(reads=10, reads_missed=3, writes=2)).stats
