"""Local routing's freshness promise (docs/client.md, "Local routing"; shardsieve/client/replica.py):
which nodes a client lists for a key from its own replica, in safe and fast mode, as the
coordinator's marks, its replica's position and its distance from the last feed message change;
and read-your-writes for the client's own writes.

Outside check: "may hold the key" is checked against each simulated node's own BloomFilter
(shardsieve/bloom.py): a node whose filter holds the key is always listed (no false negative).
"""

from __future__ import annotations

from shardsieve.client.replica import LocalReplica
from shardsieve.v1 import routing_pb2
from tests.unit.test_replica_feed import Fleet


def _feed(fleet: Fleet, replica: LocalReplica, at: float) -> None:
    for m in fleet.watch.next_messages(sub_of(fleet)):
        replica.apply(m, at)


_subs: dict[int, object] = {}


def sub_of(fleet: Fleet) -> object:
    if id(fleet) not in _subs:
        _subs[id(fleet)] = fleet.publisher.subscribe()
    return _subs[id(fleet)]


def _marks(replica: LocalReplica, at: float, mode: str = "safe", stale: tuple[str, ...] = (),
           behind: tuple[str, ...] = ()) -> None:
    """A marks-only message as the coordinator would send it (fresh unless named stale)."""
    marks = routing_pb2.FleetMarks(mode=mode, stale_after_s=2.0)
    for node_id, (epoch, sequence) in sorted(replica.positions().items()):
        marks.nodes.add(node_id=node_id, address=f"addr-{node_id}", fresh=node_id not in stale,
                        epoch=epoch, sequence=sequence + (1 if node_id in behind else 0), has_replica=True)
    replica.apply(routing_pb2.ReplicaFeed(marks=marks), at)


def _listed(replica: LocalReplica, key: bytes, at: float) -> dict[str, tuple[bool, bool]]:
    return {c.node_id: (c.stale, c.hinted) for c in replica.candidates([key], at)[0]}


def test_filters_list_the_holder_and_fresh_nodes_are_not_marked_stale() -> None:
    fleet = Fleet()
    fleet.write("node-1", [b"kelp/1"])
    replica = LocalReplica()
    _feed(fleet, replica, at=100.0)
    _marks(replica, at=100.0)
    listed = _listed(replica, b"kelp/1", at=100.5)
    assert listed.get("node-1") == (False, False)
    for node_id, node in fleet.nodes.items():
        if node.bloom.contains(b"kelp/1"):
            assert node_id in listed


def test_safe_mode_lists_a_node_the_coordinator_marks_stale_and_fast_mode_does_not() -> None:
    fleet = Fleet()
    safe, fast = LocalReplica(), LocalReplica(mode="fast")
    for replica in (safe, fast):
        for m in fleet.watch.next_messages(fleet.publisher.subscribe()):
            replica.apply(m, 10.0)
        _marks(replica, at=10.0, stale=("node-2",))
    assert _listed(safe, b"absent/key", at=10.1) == {"node-2": (True, False)}
    assert _listed(fast, b"absent/key", at=10.1) == {}


def test_a_replica_behind_the_marked_position_is_stale() -> None:
    fleet = Fleet()
    replica = LocalReplica()
    _feed(fleet, replica, at=5.0)
    _marks(replica, at=5.0, behind=("node-3",))
    assert _listed(replica, b"absent/key", at=5.1) == {"node-3": (True, False)}


def test_a_silent_feed_makes_every_node_stale_after_stale_after_s() -> None:
    fleet = Fleet()
    replica = LocalReplica()
    _feed(fleet, replica, at=50.0)
    _marks(replica, at=50.0)
    assert _listed(replica, b"absent/key", at=51.9) == {}
    assert replica.fresh_nodes(52.1) == set()
    assert set(_listed(replica, b"absent/key", at=52.1)) == set(fleet.nodes)    # safe mode: all of them


def test_own_writes_are_listed_until_the_replica_holds_them() -> None:
    fleet = Fleet()
    replica = LocalReplica()
    _feed(fleet, replica, at=1.0)
    _marks(replica, at=1.0)
    node = fleet.nodes["node-2"]
    assert replica.hold(b"net/7", "node-2", node.epoch, node.sequence + 1, now=1.0)   # the node's WriteAck
    assert _listed(replica, b"net/7", at=1.1)["node-2"] == (False, True)
    fleet.write("node-2", [b"net/7"])            # the delta that carries the write
    _feed(fleet, replica, at=1.2)
    assert _listed(replica, b"net/7", at=1.3)["node-2"] == (False, False)     # now by its filter
    assert replica.hints_held == 0
    # a write the replica already holds needs no hint
    assert not replica.hold(b"net/7", "node-2", node.epoch, node.sequence, now=1.4)


def test_hints_age_out() -> None:
    fleet = Fleet()
    replica = LocalReplica(hint_max_age_s=10.0)
    _feed(fleet, replica, at=0.0)
    _marks(replica, at=0.0)
    replica.hold(b"float/1", "node-1", 1, 99, now=0.0)
    assert "node-1" in _listed(replica, b"float/1", at=0.5)
    _marks(replica, at=11.0)
    assert "node-1" not in _listed(replica, b"float/1", at=11.0)

