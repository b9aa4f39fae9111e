"""The client library against real processes: exit codes decided by structured details, batches,
the replica feed, local routing and failover.

Outside checks: values are compared with what the nodes answer on their own NodeStorage API, and
a subscriber's replicas with the checksums the coordinator reports for the nodes (FleetStatus),
which are the nodes' own (each delta and snapshot carries the node's checksum).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path
from typing import Iterator

import pytest

from shardsieve.client import (
    CandidateUnavailable, Client, CoordinatorUnavailable, EXIT_UNAVAILABLE, EXIT_UNREACHABLE, LimitExceeded,
)
from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import free_port, wait_until
from shardsieve.v1 import admin_pb2, storage_pb2

pytestmark = pytest.mark.cluster


def cli(cluster_address: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SHARDSIEVE_CONFIG": "", "SHARDSIEVE_COORDINATOR": cluster_address}
    return subprocess.run([sys.executable, "-m", "shardsieve.cli.main", *args], capture_output=True, text=True,
                          env=env, timeout=60)


@pytest.fixture()
def cluster(tmp_path: Path) -> Iterator[LocalCluster]:
    with LocalCluster(tmp_path, nodes=3, capacity=2000, extra_coordinator_args=["--auto-rebuild", "false"]) as c:
        yield c


def test_a_dead_candidate_node_exits_7_naming_it_and_a_dead_coordinator_exits_3(cluster: LocalCluster) -> None:
    address = cluster.coordinator_address
    assert cli(address, "put", "bed/9", "sugar kelp", "--node", "node-2").returncode == 0
    cluster.stop_node("node-2", kill=True)
    for args in (["get", "bed/9"], ["put", "bed/9", "winged kelp"], ["delete", "bed/9"]):
        res = cli(address, *args)
        assert res.returncode == EXIT_UNAVAILABLE, (args, res.stderr)
        assert "node-2" in res.stderr and "cannot reach the coordinator" not in res.stderr
    status = cli(address, "status", "--json")
    assert status.returncode == 0 and "node-2" in status.stdout
    cluster.stop_coordinator(kill=True)
    res = cli(address, "get", "bed/9", "--timeout", "2")
    assert res.returncode == EXIT_UNREACHABLE and "cannot reach the coordinator" in res.stderr


def test_batches_answer_per_key_as_the_nodes_do(cluster: LocalCluster) -> None:
    with Client(cluster.coordinator_address) as client:
        written = client.put_many([(f"line/{i}".encode(), f"holdfast {i}".encode()) for i in range(300)])
        assert all(w.ok for w in written)
        keys = [f"line/{i}".encode() for i in range(0, 400, 2)]
        results = client.get_many(keys)
        for key, r in zip(keys, results):
            direct = {n: cluster.storage(n).Get(storage_pb2.GetRequest(key=key)) for n in cluster.node_addresses}
            holders = [n for n, g in direct.items() if g.found]
            assert r.ok and r.found == bool(holders)
            if holders:
                assert r.node_id in holders and r.value == direct[r.node_id].value
        deleted = client.delete_many([b"line/1", b"line/1", b"no/such"])
        assert deleted[0].deleted and not deleted[2].deleted
        with pytest.raises(LimitExceeded) as exc:
            client.get_many([b"k%d" % i for i in range(1001)])
        assert exc.value.setting == "max-batch-items"
        victim = written[5].node_id
        cluster.stop_node(victim, kill=True)
        mixed = client.get_many([written[5].key, written[6].key])
        assert isinstance(mixed[0].error, CandidateUnavailable) and victim in mixed[0].error.node_ids


def _coordinator_checksums(cluster: LocalCluster) -> dict[str, int]:
    return {n.node_id: n.checksum for n in cluster.fleet_status().nodes}


def _replica_matches(client: Client, cluster: LocalCluster) -> bool:
    assert client.replica is not None
    want = _coordinator_checksums(cluster)
    return bool(want) and client.replica.checksums() == want


def test_replica_feed_matches_the_coordinator_through_deltas_a_rebuild_and_a_restart(cluster: LocalCluster) -> None:
    with Client(cluster.coordinator_address, local_routing=True) as local, Client(cluster.coordinator_address) as plain:
        local.wait_local_ready(30)
        wait_until(lambda: _replica_matches(local, cluster), timeout=30, message="replica equals coordinator")
        plain.put_many([(f"crate/{i}".encode(), b"dulse") for i in range(500)])        # deltas
        wait_until(lambda: _replica_matches(local, cluster), timeout=30, message="replica after deltas")
        before = {n.node_id: n.epoch for n in cluster.fleet_status().nodes}
        cluster.admin().Rebuild(admin_pb2.RebuildCommand(node_ids=["node-1"], capacity=4000))
        wait_until(lambda: {n.node_id: n.epoch for n in cluster.fleet_status().nodes}["node-1"] > before["node-1"]
                   and _replica_matches(local, cluster), timeout=60, message="replica after a rebuild")
        assert local.replica is not None and local.replica.positions()["node-1"][0] > before["node-1"]
        cluster.stop_node("node-3")
        plain_keys = [f"crate/{i}".encode() for i in range(500)]
        cluster.start_node("node-3")
        cluster.wait_fresh()
        wait_until(lambda: _replica_matches(local, cluster), timeout=30, message="replica after a node restart")
        # every key is found by local routing exactly where the coordinator's Read finds it
        for key in plain_keys[:100]:
            assert local.get(key).node_id == plain.get(key).node_id


def test_local_routing_reads_its_own_writes_at_once(cluster: LocalCluster) -> None:
    with Client(cluster.coordinator_address, local_routing=True) as local:
        local.wait_local_ready(30)
        for i in range(50):
            key = f"rope/{i}".encode()
            local.put(key, b"knotted wrack")
            got = local.get(key)        # no wait: the write's ack position is a hint until the replica has it
            assert got.found and got.route == "local" and got.value == b"knotted wrack"


def test_failover_to_the_second_coordinator_and_back_to_the_first(cluster: LocalCluster) -> None:
    dead = f"127.0.0.1:{free_port()}"
    with Client([dead, cluster.coordinator_address], connect_timeout_s=0.5, rest_s=60.0) as client:
        assert client.put(b"buoy/1", b"red").ok
        assert client.pool.resting(client._clock()) == [dead]
        assert client.get(b"buoy/1").value == b"red"
    with Client(dead, connect_timeout_s=0.3, timeout_s=2.0) as client, pytest.raises(CoordinatorUnavailable) as exc:
        client.get(b"buoy/1")
    assert exc.value.tried and exc.value.tried[0] == dead


def test_the_asyncio_client_routes_locally_as_the_coordinator_does(cluster: LocalCluster) -> None:
    import asyncio

    from shardsieve.client import AsyncClient

    keys = [f"tide-log/{i}".encode() for i in range(40)]

    async def main() -> None:
        async with AsyncClient(cluster.coordinator_address, local_routing=True) as local:
            await local.wait_local_ready(30)
            written = await local.put_many([(k, b"ebb") for k in keys])
            assert all(w.ok for w in written)
            singles = [await local.get(k) for k in keys[:5]]
            many = await local.get_many(keys + [b"tide-log/none"])
            assert all(r.route == "local" and r.found for r in singles)
            assert [r.node_id for r in many[:40]] == [w.node_id for w in written] and not many[40].found

    asyncio.run(main())
    for key in keys[:5]:   # outside check: the node named holds the value on its own API
        holders = [n for n in cluster.node_addresses if cluster.storage(n).Get(storage_pb2.GetRequest(key=key)).found]
        assert len(holders) == 1
