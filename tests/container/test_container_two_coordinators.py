"""Two coordinators side by side: both route every key; when one dies the other serves every key.

Reference: docs/architecture.md#words ("coordinator": several may run side by side, each
independent of the others) and docs/architecture.md#3-bounded-staleness (a write seen by one
coordinator reaches the other within the push interval; the test waits for that with a deadline).
"""

from __future__ import annotations

import pytest

from shardsieve.testing.history import History

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(240)]

KEYS = 200  # invented scenario: bookings of a fictional ferry line, "saltmere"


def key_of(i: int) -> bytes:
    return f"saltmere/booking/{i:05d}".encode()


def value_of(i: int) -> bytes:
    return f"crossing-{i % 9}|cabin-{i % 40}".encode()


def test_two_coordinators_route_every_key_and_one_survives_the_other(cluster) -> None:
    first = cluster.start_coordinator("coordinator-a")
    second = cluster.start_coordinator("coordinator-b")
    nodes = [cluster.start_node(f"node-{i}", [first.alias, second.alias]) for i in (1, 2, 3)]
    cluster.wait_synced(first, nodes)
    cluster.wait_synced(second, nodes)
    history = History()
    via_first, via_second = cluster.driver(first, history), cluster.driver(second, history)

    # Half the writes through each coordinator.
    owners = {}
    for i in range(KEYS):
        driver = via_first if i % 2 == 0 else via_second
        owners[key_of(i)] = driver.write(key_of(i), value_of(i))
    assert all(owners.values()), "every write to a healthy fleet is acknowledged"
    assert len(set(owners.values())) >= 2, f"placement used one node only: {set(owners.values())}"

    # Each coordinator catches up with every node's stream, then routes every key to its owner.
    cluster.wait_synced(first, nodes)
    cluster.wait_synced(second, nodes)
    keys = list(owners)
    for driver in (via_first, via_second):
        for key, candidates in zip(keys, driver.locate(keys)):
            assert any(c.node_id == owners[key] and not c.stale for c in candidates), \
                (driver.coordinator.alias, key, owners[key], candidates)
        for i in range(KEYS):
            outcome = driver.read(key_of(i))
            assert outcome[:2] == ("found", value_of(i)), (driver.coordinator.alias, i, outcome)

    # One coordinator dies; the other serves every key, and still takes writes.
    cluster.kill(first)
    for i in range(KEYS):
        outcome = via_second.read(key_of(i))
        assert outcome[:2] == ("found", value_of(i)), (i, outcome)
    extra = [KEYS + i for i in range(20)]
    for i in extra:
        assert via_second.write(key_of(i), value_of(i))
    for i in extra:
        outcome = via_second.read(key_of(i))
        assert outcome[:2] == ("found", value_of(i)), (i, outcome)
    history.assert_ok()
