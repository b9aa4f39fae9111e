"""A node container is killed (SIGKILL, no clean shutdown) and a new container starts on its volume.

Checked against docs/architecture.md#1-no-false-negatives-once-synced and
docs/architecture.md#4-nothing-acknowledged-is-lost: every write the coordinator acknowledged is still on the node, the coordinator's replica of the node's filter
catches up, and afterwards no lookup misses a key. The recovery time (new container started ->
coordinator synced with the node) is measured and printed.
"""

from __future__ import annotations

import time

import pytest

from shardsieve.testing.history import History
from shardsieve.v1 import storage_pb2

pytestmark = [pytest.mark.container, pytest.mark.cluster, pytest.mark.timeout(240)]

KEYS = 240  # invented scenario: parcels of a fictional courier, "harbourline"


def key_of(i: int) -> bytes:
    return f"harbourline/parcel/{i:05d}".encode()


def value_of(i: int) -> bytes:
    return f"depot-{i % 7}|weight-{(i * 37) % 900}g".encode()


def test_killed_node_restarts_on_its_volume_with_every_acknowledged_write(cluster, report_time) -> None:
    coordinator = cluster.start_coordinator()
    nodes = [cluster.start_node(f"node-{i}", [coordinator.alias]) for i in (1, 2, 3)]
    cluster.wait_synced(coordinator, nodes)
    history = History()
    driver = cluster.driver(coordinator, history)

    owners = {key_of(i): driver.write(key_of(i), value_of(i)) for i in range(KEYS)}
    assert all(owners.values()), "every write to a healthy fleet is acknowledged"
    victim = cluster.daemons["node-2"]
    victim_keys = [k for k, owner in owners.items() if owner == victim.alias]
    assert victim_keys, f"placement put no key on {victim.alias}; owners: {set(owners.values())}"

    cluster.kill(victim)
    # While it is down, its keys are not "absent": safe mode lists it and the read cannot prove absence.
    outcome = driver.read(victim_keys[0], deadline_ms=800)
    assert outcome[0] == "error" and outcome[2].startswith("UNAVAILABLE"), outcome

    started = time.monotonic()
    victim = cluster.replace_node(victim)   # a NEW container on the same named volume
    serving_s = cluster.wait_serving(victim)
    cluster.wait_synced(coordinator, [victim])
    report_time("node restart: container start -> health SERVING", serving_s)
    report_time("node restart: container start -> coordinator synced", time.monotonic() - started)

    # Every acknowledged write is on the node's store, byte for byte (asked directly, not routed).
    stub = victim.storage()
    reply = stub.BatchGet(storage_pb2.BatchGetRequest(keys=victim_keys), timeout=10)
    lost = [k for k, item in zip(victim_keys, reply.items) if not item.found]
    changed = [k for k, item in zip(victim_keys, reply.items)
               if item.found and item.value != value_of(int(k.rsplit(b"/", 1)[1]))]
    assert not lost and not changed, f"lost {lost[:5]} changed {changed[:5]} of {len(victim_keys)}"

    # Its filter resynced: every key's owner is listed by the filter replica, fresh (not stale, not a hint).
    keys = list(owners)
    for key, candidates in zip(keys, driver.locate(keys)):
        owner = [c for c in candidates if c.node_id == owners[key]]
        assert owner and not owner[0].stale and not owner[0].hinted, (key, candidates)

    # And every read finds its value; the history checker judges the whole run.
    for i in range(KEYS):
        outcome = driver.read(key_of(i))
        assert outcome[:2] == ("found", value_of(i)), (i, outcome)
    history.assert_ok()
