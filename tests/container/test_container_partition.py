"""A node is cut off — its container frozen (docker pause) or taken off the network (docker
network disconnect): the coordinator must not turn "cannot ask" into "not found".

Reference: the Router contract in proto/shardsieve/v1/routing.proto ("UNAVAILABLE when a
candidate that may hold the key could not be asked: absence cannot be proven then") and the safe
mode rule of docs/architecture.md#words ("stale": a node whose stream is down or from which
nothing arrived for stale-after-s; safe mode adds stale nodes to every candidate list). After healing the
node resyncs and reads succeed; the heal -> resynced time is measured and printed.
"""

from __future__ import annotations

import time

import pytest

from shardsieve.testing.history import History
from shardsieve.testing.procs import wait_until

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(240)]

KEYS = 180  # invented scenario: seed packets of a fictional nursery, "fernhollow"


def key_of(i: int) -> bytes:
    return f"fernhollow/packet/{i:05d}".encode()


def value_of(i: int) -> bytes:
    return f"bed-{i % 11}|sown-day-{i % 365}".encode()


@pytest.mark.parametrize("how", ["pause", "disconnect"])
def test_cut_off_node_is_stale_and_unavailable_never_absent_then_heals(cluster, report_time, how: str) -> None:
    coordinator = cluster.start_coordinator()
    nodes = [cluster.start_node(f"node-{i}", [coordinator.alias]) for i in (1, 2, 3)]
    cluster.wait_synced(coordinator, nodes)
    history = History()
    driver = cluster.driver(coordinator, history)
    owners = {key_of(i): driver.write(key_of(i), value_of(i)) for i in range(KEYS)}
    assert all(owners.values()), "every write to a healthy fleet is acknowledged"
    cluster.wait_synced(coordinator, nodes)

    victim = cluster.daemons["node-3"]
    victim_keys = [k for k, o in owners.items() if o == victim.alias]
    other_keys = [k for k, o in owners.items() if o != victim.alias]
    assert victim_keys and other_keys, f"placement: {set(owners.values())}"

    cut = time.monotonic()
    cluster.pause(victim) if how == "pause" else cluster.disconnect(victim)
    wait_until(lambda: cluster.fleet(coordinator)[victim.alias].stale, 20, interval=0.05,
               message=f"{victim.alias} to be reported stale")
    report_time(f"partition ({how}): cut -> coordinator reports the node stale", time.monotonic() - cut)

    # Safe mode lists the cut-off node, marked stale, for its keys (and every other key).
    for key, candidates in zip(victim_keys, driver.locate(victim_keys)):
        listed = {c.node_id: c for c in candidates}
        assert victim.alias in listed and listed[victim.alias].stale, (key, candidates)

    # Reads of its keys fail with UNAVAILABLE naming the node, never a "not found".
    sample = victim_keys[:8]
    for key in sample:
        kind, _, detail = driver.read(key, deadline_ms=600)
        assert kind == "error", f"read of {key!r} on a cut-off node returned {kind}: a wrong answer"
        assert detail.startswith("UNAVAILABLE") and victim.alias in detail, detail
    # Keys held elsewhere are still served (the first candidate that has it answers).
    for key in other_keys[:8]:
        assert driver.read(key, deadline_ms=600)[0] == "found"

    healed = time.monotonic()
    cluster.unpause(victim) if how == "pause" else cluster.reconnect(victim)
    cluster.wait_synced(coordinator, [victim])
    report_time(f"partition ({how}): heal -> coordinator synced with the node", time.monotonic() - healed)

    for key, candidates in zip(victim_keys, driver.locate(victim_keys)):
        assert any(c.node_id == victim.alias and not c.stale for c in candidates), (key, candidates)
    for i in range(KEYS):
        outcome = driver.read(key_of(i))
        assert outcome[:2] == ("found", value_of(i)), (i, outcome)
    history.assert_ok()
