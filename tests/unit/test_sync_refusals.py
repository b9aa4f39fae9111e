"""Positions that cannot follow, and node ids outside the alphabet, are refused by the
coordinator's protocol object with nothing changed (docs/sync-protocol.md, "Positions that
cannot follow"; docs/architecture.md#5-bad-input-changes-nothing).

Each hostile message is built from the real state of a real NodeSync (so, but for the one
field under test, it is a message the coordinator would take) and sent to a CoordinatorSync
over the real replica sink: the routing index behind coordinator/replicas.py. Before and
after, the test compares the replica's bits, its checksum computed here from those bits, and
the candidates the index returns for a set of keys (present and absent); all must be equal.
The uint64 bound of the wire fields is the protobuf language guide's ("Scalar Value Types":
uint64 holds 0 to 2^64 - 1).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Any, Callable

import pytest

from shardsieve.bloom import BloomFilter, CountingBloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import encode_delta
from shardsieve.coordinator.replicas import Replicas
from shardsieve.coordinator.routing_index import RoutingIndex
from shardsieve.geometry import Geometry
from shardsieve.limits import NODE_ID_RULE, SyncLimits, check_node_message
from shardsieve.snapshot import encode_snapshot
from shardsieve.sync.bounds import MAX_EPOCH, MAX_SEQUENCE
from shardsieve.sync.coordinator_side import CoordinatorSync, SnapshotRejected
from shardsieve.sync.errors import (
    EpochBehindReplica,
    FloorAboveSequence,
    InvalidHello,
    PositionOutOfRange,
    SyncError,
)
from shardsieve.sync.node_side import NodeSync
from shardsieve.v1 import filter_pb2, sync_pb2

NODE = "kelp-shed-4"
PEER = "coordinator-a"
G = Geometry(bits=2048, hashes=4, seed=5)
UINT64_MAX = 2**64 - 1       # the largest value of a uint64 field (protobuf language guide)
EPOCH = 3
STORED = [f"kelp-lot-{i:02d}" for i in range(24)]
PROBE = [k.encode() for k in STORED] + [f"absent-{i:02d}".encode() for i in range(40)]
_IDS = itertools.count(1000)


@dataclass
class Fleet:
    """One node synced with one coordinator; the node's stream is `stream`."""

    node: NodeSync
    coord: CoordinatorSync
    replicas: Replicas
    stream: int

    def pump(self) -> None:
        """Move every message both ways (in order, none lost) until both sides are quiet."""
        for _ in range(50):
            ready = self.node.ready(0.0, {PEER: 1 << 22})
            self.node.ack(ready)
            out = list(ready.messages.get(PEER, ()))
            if not out:
                return
            for msg in out:
                if msg.WhichOneof("body") == "hello":
                    replies = self.coord.open(self.stream, msg.hello, 0.0).replies
                else:
                    replies = self.coord.receive(NODE, self.stream, msg, 0.0).replies
                for reply in replies:
                    self.node.receive(PEER, reply, 0.0)
        raise AssertionError("the link did not go quiet")

    def reconnect(self) -> sync_pb2.Hello:
        """A new stream: its Hello names the node's position now."""
        self.coord.close(NODE, self.stream, 0.0)
        self.node.disconnect(PEER)
        self.stream += 1
        self.node.connect(PEER, 0.0)
        ready = self.node.ready(0.0, {})
        self.node.ack(ready)
        (hello,) = ready.messages[PEER]
        self.node.receive(PEER, self.coord.open(self.stream, hello.hello, 0.0).replies[0], 0.0)
        self.pump()
        return hello.hello


def synced() -> Fleet:
    """A node at epoch 3 with six deltas applied, on a stream whose Hello named (3, 6)."""
    counting = CountingBloomFilter(G)
    counting.add_batch(STORED[:12])
    node = NodeSync(NODE, "127.0.0.1:7100", counting, epoch=EPOCH, capacity=200, target_fpr=0.01, key_count=12)
    replicas = Replicas(RoutingIndex(workers=1))
    fleet = Fleet(node, CoordinatorSync(replicas), replicas, 1)
    node.connect(PEER, 0.0)
    fleet.pump()
    for key in STORED[12:18]:
        node.record([key.encode()])
        node.cut()
    fleet.pump()
    fleet.reconnect()
    assert fleet.coord.position(NODE) == (EPOCH, 6) == (node.epoch, node.sequence)
    return fleet


def replica_checksum(bits: Any) -> int:
    """The replica's checksum computed here from its 0/1 bits: XOR over the set positions of the
    SplitMix64 finalizer of (position + golden ratio) (Steele, Lea & Flood, "Fast splittable
    pseudorandom number generators", OOPSLA 2014), as docs/sync-protocol.md defines it."""
    mask = 2**64 - 1
    total = 0
    for position, bit in enumerate(bits):
        if bit:
            z = (position + 0x9E3779B97F4A7C15) & mask
            z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & mask
            z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & mask
            total ^= z ^ (z >> 31)
    return total


def observed(fleet: Fleet) -> tuple[Any, ...]:
    """Everything a refusal must leave as it was: replica bits and checksum, candidates, and the
    node's protocol state."""
    column = fleet.replicas.column(NODE)
    view = fleet.coord.node(NODE)
    assert view is not None
    return (column.tobytes(), replica_checksum(column.tolist()), fleet.replicas.locate(PROBE).lists(), view.position,
            view.checksum, view.geometry, view.awaiting_snapshot, view.connected, view.key_count)


def full_state(fleet: Fleet) -> tuple[Any, ...]:
    view = fleet.coord.node(NODE)
    assert view is not None
    return observed(fleet) + (view.last_heard_at, view.last_applied_at, view.counters, view.storage_address,
                              fleet.coord.is_connected(NODE))


def hello_like(fleet: Fleet, **fields: Any) -> sync_pb2.Hello:
    node = fleet.node
    hello = sync_pb2.Hello(node_id=NODE, storage_address="127.0.0.1:7100", geometry=G.to_proto(), epoch=node.epoch,
                           sequence=node.sequence, checksum=node.checksum, key_count=node.key_count, capacity=200,
                           target_fpr=0.01, push_interval_ms=50, protocol_version=1, history_floor=node.history_floor)
    for name, value in fields.items():
        setattr(hello, name, value)
    return hello


def delta_at(epoch: int, sequence: int) -> sync_pb2.NodeMessage:
    """A well-formed delta (one new bit) at any position."""
    changes = ChangeSet.of([7], [])
    return sync_pb2.NodeMessage(delta=filter_pb2.Delta(epoch=epoch, sequence=sequence,
                                                       payload=encode_delta(changes, G.bits),
                                                       checksum=changes.checksum_after(0), key_count=13))


def snapshot_at(bloom: BloomFilter, epoch: int, sequence: int) -> list[sync_pb2.NodeMessage]:
    """A snapshot of a real filter state, its checksum right, at any position."""
    snapshot_id = next(_IDS)
    enc = encode_snapshot(bloom, max_chunk_bytes=64)
    return [sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
        snapshot_id=snapshot_id, epoch=epoch, sequence=sequence, geometry=bloom.geometry.to_proto(),
        encoding=enc.encoding, purpose=filter_pb2.SNAPSHOT_PURPOSE_RESYNC, chunk_index=i,
        chunk_count=enc.chunk_count, total_bytes=enc.total_bytes, data=data, checksum=bloom.checksum,
        key_count=20, capacity=200)) for i, data in enumerate(enc.chunks)]


def newer_state(fleet: Fleet) -> BloomFilter:
    """A filter state the node does not have yet (its current one plus two keys)."""
    bloom = fleet.node.filter.bloom()
    for key in STORED[18:20]:
        bloom.add(key)
    return bloom


# ----------------------------------------------------------------------------- refused with an error

RAISED: dict[str, tuple[Callable[[Fleet], None], type[SyncError], tuple[str, ...]]] = {
    "hello at sequence 2^64-1": (
        lambda f: f.coord.open(99, hello_like(f, sequence=UINT64_MAX, history_floor=0), 0.0),
        PositionOutOfRange, (str(UINT64_MAX), str(MAX_SEQUENCE))),
    "hello at epoch 2^64-1": (
        lambda f: f.coord.open(99, hello_like(f, epoch=UINT64_MAX), 0.0),
        PositionOutOfRange, (str(UINT64_MAX), str(MAX_EPOCH))),
    "hello with its history floor above its sequence": (
        lambda f: f.coord.open(99, hello_like(f, history_floor=9), 0.0),
        FloorAboveSequence, ("floor 9", "sequence 6")),
    "hello from an epoch older than the replica's": (
        lambda f: f.coord.open(99, hello_like(f, epoch=EPOCH - 1, sequence=40, history_floor=40), 0.0),
        EpochBehindReplica, ("epoch 2", f"epoch {EPOCH}")),
    "delta from an epoch older than the replica's": (
        lambda f: f.coord.receive(NODE, f.stream, delta_at(EPOCH - 1, 7), 0.0),
        EpochBehindReplica, ("epoch 2", f"epoch {EPOCH}")),
    "delta at sequence 2^64-1": (
        lambda f: f.coord.receive(NODE, f.stream, delta_at(EPOCH, UINT64_MAX), 0.0),
        PositionOutOfRange, (str(UINT64_MAX),)),
    "delta at epoch 2^64-1": (
        lambda f: f.coord.receive(NODE, f.stream, delta_at(UINT64_MAX, 1), 0.0),
        PositionOutOfRange, (str(UINT64_MAX),)),
    "delta at sequence 0 (a baseline, not a change)": (
        lambda f: f.coord.receive(NODE, f.stream, delta_at(EPOCH, 0), 0.0),
        PositionOutOfRange, ("sequence 0",)),
}


@pytest.mark.parametrize("case", list(RAISED))
def test_a_position_that_cannot_follow_is_refused_with_its_numbers_and_changes_nothing(case: str) -> None:
    call, error, numbers = RAISED[case]
    fleet = synced()
    before = full_state(fleet)
    with pytest.raises(error) as refused:
        call(fleet)
    for number in numbers:
        assert number in str(refused.value)
    assert full_state(fleet) == before


def test_the_refusals_carry_the_numbers_as_fields() -> None:
    fleet = synced()
    with pytest.raises(PositionOutOfRange) as out_of_range:
        fleet.coord.receive(NODE, fleet.stream, delta_at(EPOCH, UINT64_MAX), 0.0)
    assert (out_of_range.value.epoch, out_of_range.value.sequence) == (EPOCH, UINT64_MAX)
    assert (out_of_range.value.max_epoch, out_of_range.value.max_sequence) == (MAX_EPOCH, MAX_SEQUENCE)
    with pytest.raises(EpochBehindReplica) as behind:
        fleet.coord.receive(NODE, fleet.stream, delta_at(1, 7), 0.0)
    assert (behind.value.epoch, behind.value.replica_epoch) == (1, EPOCH)
    with pytest.raises(FloorAboveSequence) as floor:
        fleet.coord.open(99, hello_like(fleet, history_floor=9), 0.0)
    assert (floor.value.history_floor, floor.value.sequence) == (9, 6)
    # the gRPC status each ends the stream with (docs/sync-protocol.md, "Positions that cannot follow")
    assert [e.grpc_status_name for e in (out_of_range.value, behind.value, floor.value)] == [
        "INVALID_ARGUMENT", "FAILED_PRECONDITION", "INVALID_ARGUMENT"]


def test_the_largest_position_is_taken_and_one_more_fits_the_wire() -> None:
    # the bound leaves room: the next sequence after MAX_SEQUENCE is still a uint64
    assert MAX_SEQUENCE + 1 <= UINT64_MAX and MAX_EPOCH + 1 <= UINT64_MAX
    fleet = synced()
    fleet.coord.close(NODE, fleet.stream, 0.0)
    result = fleet.coord.open(50, hello_like(fleet, epoch=MAX_EPOCH, sequence=MAX_SEQUENCE), 0.0)
    assert [r.need_snapshot.reason for r in result.replies] == [sync_pb2.SNAPSHOT_REASON_UNKNOWN_EPOCH]


# ----------------------------------------------------------------------------- refused by SnapshotRejected

SNAPSHOTS: dict[str, Callable[[Fleet], list[sync_pb2.NodeMessage]]] = {
    # the measured case: a verified filter at the last uint64 sequence would freeze the replica
    "at sequence 2^64-1": lambda f: snapshot_at(newer_state(f), EPOCH, UINT64_MAX),
    "at epoch 2^64-1": lambda f: snapshot_at(newer_state(f), UINT64_MAX, 0),
    # a verified filter of an older epoch would roll the replica back
    "from an epoch older than the replica's": lambda f: snapshot_at(newer_state(f), EPOCH - 1, 50),
    # the node announced (3, 6) in its Hello on this stream; its snapshots are never behind it
    "behind the position of the stream's Hello": lambda f: snapshot_at(newer_state(f), EPOCH, 5),
}


@pytest.mark.parametrize("case", list(SNAPSHOTS))
def test_a_snapshot_that_cannot_follow_is_rejected_and_changes_nothing(case: str) -> None:
    fleet = synced()
    chunks = SNAPSHOTS[case](fleet)
    before = observed(fleet)
    first = fleet.coord.receive(NODE, fleet.stream, chunks[0], 1.0)
    (reply,) = first.replies
    assert reply.WhichOneof("body") == "snapshot_rejected"
    assert reply.snapshot_rejected.snapshot_id == chunks[0].snapshot_chunk.snapshot_id
    detail = reply.snapshot_rejected.detail
    c = chunks[0].snapshot_chunk
    assert f"epoch {c.epoch}" in detail and f"sequence {c.sequence}" in detail
    assert first.events == (SnapshotRejected(NODE, c.snapshot_id, detail),)
    for chunk in chunks[1:]:                       # the rest of it is ignored, not installed
        assert fleet.coord.receive(NODE, fleet.stream, chunk, 1.0).replies == ()
    assert observed(fleet) == before


def test_the_same_snapshot_at_a_position_that_follows_is_installed() -> None:
    # the control for the cases above: only the position made them unacceptable
    fleet = synced()
    bloom = newer_state(fleet)
    before = observed(fleet)
    for chunk in snapshot_at(bloom, EPOCH, 7):
        fleet.coord.receive(NODE, fleet.stream, chunk, 1.0)
    after = observed(fleet)
    assert after != before and after[3] == (EPOCH, 7) and after[1] == bloom.checksum


# ----------------------------------------------------------------------------- node ids

BAD_IDS = {
    "look-alike": "n\u043ede-1",       # Cyrillic small letter o (U+043E) in place of Latin o
    "dot": ".",
    "dot-dot": "..",
    "slash": "kelp/shed-1",
    "control": "kelp\x00shed",
    "newline": "kelp-shed\n",
    "upper case": "Kelp-Shed-1",
    "leading dash": "-kelp",
    "too long": "k" * 65,
    "empty": "",
}


@pytest.mark.parametrize("name", list(BAD_IDS))
def test_a_hello_with_an_id_outside_the_alphabet_is_refused_naming_the_rule(name: str) -> None:
    fleet = synced()
    before = full_state(fleet)
    with pytest.raises(InvalidHello) as refused:
        fleet.coord.open(99, hello_like(fleet, node_id=BAD_IDS[name]), 0.0)
    assert refused.value.grpc_status_name == "INVALID_ARGUMENT" and NODE_ID_RULE in str(refused.value)
    assert full_state(fleet) == before and fleet.coord.node_ids() == [NODE]
    # the servicer's limit check, which runs before the protocol object, says the same
    with pytest.raises(InvalidHello, match="a node id is 1 to 64 characters"):
        check_node_message(sync_pb2.NodeMessage(hello=hello_like(fleet, node_id=BAD_IDS[name])), SyncLimits())


def test_the_look_alike_is_named_by_its_code_point() -> None:
    fleet = synced()
    with pytest.raises(InvalidHello, match=r"U\+043E"):
        fleet.coord.open(99, hello_like(fleet, node_id=BAD_IDS["look-alike"]), 0.0)


@pytest.mark.parametrize("node_id", ["node-1", "kelp-shed.4_b", "0", "a" * 64])
def test_ids_inside_the_alphabet_are_taken(node_id: str) -> None:
    fleet = synced()
    result = fleet.coord.open(99, hello_like(fleet, node_id=node_id), 0.0)
    assert [r.need_snapshot.reason for r in result.replies] == [sync_pb2.SNAPSHOT_REASON_NO_REPLICA]
    assert node_id in fleet.coord.node_ids()
