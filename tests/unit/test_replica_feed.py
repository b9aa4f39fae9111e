"""The replica feed (coordinator/replica_feed.py, replica_watch.py) and a subscriber's replica
(shardsieve/client/replica.py), in process: simulated nodes feed a coordinator's state, the
feed's messages feed a LocalReplica.

Outside check: a subscriber's replica equals the coordinator's by checksum, and each checksum
is the one the simulated node's own BloomFilter computes (shardsieve/bloom.py), so both ends
hold exactly the node's filter, bit for bit (the RAW bytes are compared too).
"""

from __future__ import annotations

import time

import pytest

from shardsieve.client.replica import LocalReplica
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.replica_feed import FeedFull, ReplicaPublisher, ReplicaTap
from shardsieve.coordinator.replica_watch import ReplicaWatch
from shardsieve.coordinator.wiring import CoordinatorState, wire_state
from shardsieve.testing.replica_fleet import SimNode, attach, push
from shardsieve.v1 import routing_pb2


class Fleet:
    """A coordinator's state with the feed tapped in, and simulated nodes."""

    def __init__(self, nodes: int = 3, max_entries: int = 8192, max_subscribers: int = 64) -> None:
        self.publisher = ReplicaPublisher(lambda n: self.state.shell.node(n), max_entries=max_entries,
                                          max_subscribers=max_subscribers)
        self.state: CoordinatorState = wire_state(Policy(stale_after_s=3600.0),
                                                  sink_tap=lambda sink: ReplicaTap(sink, self.publisher))
        self.state.shell.subscribe(self.publisher.on_event)
        self.watch = ReplicaWatch(self.publisher, self.state.shell, self.state.membership, self.state.policy,
                                  self.state.replicas.packed)
        self.nodes = {f"node-{i}": SimNode(f"node-{i}") for i in range(1, nodes + 1)}
        for node in self.nodes.values():
            attach(self.state.shell, node)

    def write(self, node_id: str, keys: list[bytes]) -> None:
        self.nodes[node_id].add(keys)
        push(self.state.shell, self.nodes[node_id])


def drain(fleet: Fleet, sub: object, replica: LocalReplica) -> list[routing_pb2.ReplicaFeed]:
    messages = fleet.watch.next_messages(sub)  # type: ignore[arg-type]
    for m in messages:
        replica.apply(m, time.monotonic())
    return messages


def assert_same(fleet: Fleet, replica: LocalReplica) -> None:
    coordinator = {s.node_id: s.checksum for s in fleet.state.shell.nodes() if s.has_replica}
    nodes = {n.node_id: n.bloom.checksum for n in fleet.nodes.values()}
    assert replica.checksums() == coordinator == nodes
    for node_id, node in fleet.nodes.items():
        assert replica.packed(node_id) == node.bloom.to_bytes()


def test_snapshots_then_deltas_give_the_subscriber_the_coordinators_replicas() -> None:
    fleet = Fleet()
    fleet.write("node-1", [b"kelp/1", b"kelp/2"])       # before anyone subscribes: not logged
    sub, replica = fleet.publisher.subscribe(), LocalReplica()
    first = drain(fleet, sub, replica)
    assert first[0].reset and replica.ready()
    assert_same(fleet, replica)
    for i in range(20):
        fleet.write(f"node-{1 + i % 3}", [f"line/{i}/{j}".encode() for j in range(5)])
    messages = drain(fleet, sub, replica)
    assert not messages[0].reset and sum(len(m.updates) for m in messages) == 20   # one delta each
    assert_same(fleet, replica)
    assert not replica.needs_resync


def test_a_rebuild_and_a_node_restart_behind_the_replica_reach_the_subscriber() -> None:
    fleet = Fleet()
    sub, replica = fleet.publisher.subscribe(), LocalReplica()
    drain(fleet, sub, replica)
    fleet.write("node-2", [f"rope/{i}".encode() for i in range(50)])
    node = fleet.nodes["node-2"]
    node.rebuild(capacity=8000)                         # new epoch, new geometry
    attach(fleet.state.shell, node)
    drain(fleet, sub, replica)
    assert replica.positions()["node-2"] == (2, 0)
    assert_same(fleet, replica)
    # node-3 restarts having lost its last deltas: it comes back behind the subscriber's replica
    n3 = fleet.nodes["node-3"]
    n3.add([b"lost/1"])
    push(fleet.state.shell, n3)
    drain(fleet, sub, replica)
    fresh = SimNode("node-3", address=n3.address)
    fresh.add(list(n3.keys - {b"lost/1"}) + [b"other/1"])
    fresh.delta()
    fresh.sequence = 0
    fleet.nodes["node-3"] = fresh
    attach(fleet.state.shell, fresh)
    drain(fleet, sub, replica)
    assert_same(fleet, replica)


def test_a_subscriber_that_falls_behind_gets_a_fresh_snapshot() -> None:
    fleet = Fleet(max_entries=8)
    sub, replica = fleet.publisher.subscribe(), LocalReplica()
    drain(fleet, sub, replica)
    for i in range(30):                                  # more than the log keeps, unread
        fleet.write("node-1", [f"buoy/{i}".encode()])
    messages = drain(fleet, sub, replica)
    assert messages[0].reset and sub.resets == 2
    assert_same(fleet, replica)


def test_an_unlisted_node_leaves_the_subscriber() -> None:
    fleet = Fleet()
    sub, replica = fleet.publisher.subscribe(), LocalReplica()
    drain(fleet, sub, replica)
    fleet.state.shell.unlist("node-3")
    del fleet.nodes["node-3"]
    drain(fleet, sub, replica)
    assert "node-3" not in replica.checksums()
    assert_same(fleet, replica)


def test_a_delta_that_does_not_verify_changes_nothing_and_asks_for_a_resync() -> None:
    fleet = Fleet()
    sub, replica = fleet.publisher.subscribe(), LocalReplica()
    drain(fleet, sub, replica)
    before = replica.packed("node-1")
    fleet.write("node-1", [b"crate/1"])
    messages = fleet.watch.next_messages(sub)
    tampered = routing_pb2.ReplicaFeed()
    tampered.CopyFrom(messages[0])
    tampered.updates[0].delta.checksum ^= 1
    replica.apply(tampered, time.monotonic())
    assert replica.needs_resync and replica.packed("node-1") == before


def test_subscribers_are_capped() -> None:
    fleet = Fleet(max_subscribers=2)
    fleet.publisher.subscribe()
    second = fleet.publisher.subscribe()
    with pytest.raises(FeedFull, match="max-replica-subscribers"):
        fleet.publisher.subscribe()
    fleet.publisher.unsubscribe(second)
    fleet.publisher.subscribe()
