"""Unlisting a node gone for good, on real processes: `shardsieve unlist` against a live LocalCluster.

Outside checks: the node's own process state (stopped / still answering its NodeStorage API) and
the coordinator's state dir on disk, besides the coordinator's replies. The behaviour expected is
docs/coordinator.md, "Removing a node for good", and docs/cli.md (exit codes 0, 2, 6).
"""

from __future__ import annotations

import json

import grpc
import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli
from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import routing_pb2, storage_pb2

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(120)]


def run(cluster: LocalCluster, *args: str):  # type: ignore[no-untyped-def]
    env = {"SHARDSIEVE_COORDINATOR": cluster.coordinator_address, "SHARDSIEVE_CONFIG": ""}
    return CliRunner().invoke(cli, list(args), env=env, catch_exceptions=False)


def status_ids(cluster: LocalCluster) -> list[str]:
    return sorted(n.node_id for n in cluster.fleet_status().nodes)


def test_unlist_a_stopped_node_turns_unavailable_reads_into_clean_not_found(tmp_path) -> None:
    with LocalCluster(tmp_path, nodes=2, capacity=1000, extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
        router = cluster.router()
        router.Write(routing_pb2.WriteRequest(key=b"buoy-7", value=b"amber", node_id="node-2"), timeout=5)
        assert router.Read(routing_pb2.ReadRequest(key=b"buoy-7"), timeout=5).node_id == "node-2"

        # A connected node is refused without --force, and nothing changes.
        before = status_ids(cluster)
        refused = run(cluster, "unlist", "node-1", "--yes")
        assert refused.exit_code == 6, refused.output
        assert "node-1" in refused.output and "is connected" in refused.output and "force" in refused.output
        no_yes = run(cluster, "unlist", "node-1")                    # no terminal, no --yes: usage error
        assert no_yes.exit_code == 2 and "unreachable through this coordinator" in no_yes.output
        assert status_ids(cluster) == before == ["node-1", "node-2"]
        n1 = next(n for n in cluster.fleet_status().nodes if n.node_id == "node-1")
        assert n1.connected and n1.state == "fresh"

        # node-2 goes away: safe mode lists it stale, and reads that need it cannot prove absence.
        cluster.stop_node("node-2")
        cluster.wait_node_state("node-2", lambda n: not n.connected, timeout=20, what="node-2 disconnected")
        for key in (b"buoy-7", b"never-written"):
            with pytest.raises(grpc.RpcError) as err:
                router.Read(routing_pb2.ReadRequest(key=key), timeout=5)
            assert err.value.code() == grpc.StatusCode.UNAVAILABLE and "node-2" in err.value.details()

        unlisted = run(cluster, "unlist", "node-2", "--yes", "--json")
        assert unlisted.exit_code == 0, unlisted.output
        doc = json.loads(unlisted.stdout)
        assert doc["node_id"] == "node-2" and doc["was_connected"] is False and doc["had_replica"] is True

        reply = router.Read(routing_pb2.ReadRequest(key=b"buoy-7"), timeout=5)
        assert not reply.found and reply.candidates == 0
        assert not router.Read(routing_pb2.ReadRequest(key=b"never-written"), timeout=5).found
        assert status_ids(cluster) == ["node-1"]
        membership = json.loads((tmp_path / "coordinator" / "nodes.json").read_text())["nodes"]
        assert sorted(membership) == ["node-1"]
        # node-1 was never touched: it still serves its own API
        assert cluster.storage("node-1").Get(storage_pb2.GetRequest(key=b"buoy-7"), timeout=5).found is False
        wait_until(lambda: cluster.all_fresh(["node-1"]), 10, message="node-1 still synced")
