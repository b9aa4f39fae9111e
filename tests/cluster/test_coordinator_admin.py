"""Coordinator operations on real processes: bearer token, policy validation, rebuild dry-run,
Prometheus metrics and the standard gRPC health service.

References: gRPC health checking protocol (grpc/grpc doc/health-checking.md: SERVING = 1);
Prometheus text exposition format parsed by prometheus_client's own parser.
"""

from __future__ import annotations

import urllib.request

import grpc
import pytest
from prometheus_client.parser import text_string_to_metric_families

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import health_status, wait_until
from shardsieve.v1 import admin_pb2, routing_pb2

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(90)]

TOKEN = "harbour-lights-7"


def test_admin_token_policy_rebuild_plan_metrics_and_health(tmp_path) -> None:
    with LocalCluster(tmp_path, nodes=2, capacity=1000, token=TOKEN, metrics=True,
                      extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
        admin = cluster.admin()
        good = [("authorization", f"Bearer {TOKEN}")]
        # Missing or wrong token: UNAUTHENTICATED, and the token never appears in the log.
        for metadata in ([], [("authorization", "Bearer nope")], [("authorization", TOKEN)]):
            with pytest.raises(grpc.RpcError) as err:
                admin.GetPolicy(admin_pb2.PolicyGetRequest(), metadata=metadata, timeout=5)
            assert err.value.code() == grpc.StatusCode.UNAUTHENTICATED
        before = admin.GetPolicy(admin_pb2.PolicyGetRequest(), metadata=good, timeout=5)

        # Policy is validated as a whole: one bad value changes nothing, and the error names it.
        with pytest.raises(grpc.RpcError) as err:
            admin.SetPolicy(admin_pb2.PolicySetRequest(values={"growth": "3", "target-fpr": "2"}),
                            metadata=good, timeout=5)
        assert err.value.code() == grpc.StatusCode.INVALID_ARGUMENT and "target-fpr" in err.value.details()
        with pytest.raises(grpc.RpcError) as err:
            admin.SetPolicy(admin_pb2.PolicySetRequest(values={"speed": "max"}), metadata=good, timeout=5)
        assert "speed" in err.value.details()
        assert admin.GetPolicy(admin_pb2.PolicyGetRequest(), metadata=good, timeout=5) == before
        after = admin.SetPolicy(admin_pb2.PolicySetRequest(values={"growth": "3", "max-concurrent-rebuilds": "2"}),
                                metadata=good, timeout=5)
        assert (after.growth, after.max_concurrent_rebuilds) == (3.0, 2)

        # Rebuild dry run: a plan, nothing started (epochs unchanged).
        plan = admin.Rebuild(admin_pb2.RebuildCommand(node_ids=["node-1"], capacity=5000, dry_run=True),
                             metadata=good, timeout=5)
        assert plan.dry_run and [p.node_id for p in plan.plan] == ["node-1"] and plan.plan[0].capacity == 5000
        assert plan.plan[0].geometry.bits >= 5000
        assert all(n.epoch == 1 for n in cluster.fleet_status().nodes)
        with pytest.raises(grpc.RpcError) as err:
            admin.Rebuild(admin_pb2.RebuildCommand(node_ids=["node-9"]), metadata=good, timeout=5)
        assert err.value.code() == grpc.StatusCode.NOT_FOUND and "node-9" in err.value.details()

        # A real rebuild on operator request: node-1 moves to epoch 2 at the asked capacity.
        admin.Rebuild(admin_pb2.RebuildCommand(node_ids=["node-1"], capacity=5000), metadata=good, timeout=5)
        cluster.wait_node_state("node-1", lambda n: n.epoch == 2 and n.capacity == 5000 and n.state == "fresh",
                                timeout=30, what="operator rebuild")

        # Metrics: lookups, candidates histogram, wasted probes, per-node fill/FPR/lag, delta bytes, rebuilds.
        router = cluster.router()
        router.Write(routing_pb2.WriteRequest(key=b"lamp-1", value=b"on"), timeout=5)
        router.Read(routing_pb2.ReadRequest(key=b"lamp-1"), timeout=5)
        url = f"http://127.0.0.1:{cluster.coordinator_metrics_port}/metrics"

        def scrape() -> dict[str, list]:
            text = urllib.request.urlopen(url, timeout=5).read().decode()
            return {f.name: f.samples for f in text_string_to_metric_families(text)}

        def delta_bytes_of(m: dict[str, list]) -> float:
            return sum(s.value for s in m.get("shardsieve_coordinator_node_sync_received_bytes", [])
                       if s.name.endswith("_total") and s.labels["kind"] == "delta")

        # the write's delta reaches the coordinator within a push interval: wait for it
        metrics = wait_until(lambda: (m := scrape()) and delta_bytes_of(m) > 0 and m, 10,
                             message="metrics scrape with the write's delta")
        for name in ("shardsieve_coordinator_lookups", "shardsieve_coordinator_candidates_per_lookup",
                     "shardsieve_coordinator_node_wasted_probes", "shardsieve_coordinator_node_fill_ratio",
                     "shardsieve_coordinator_node_predicted_false_positive_ratio",
                     "shardsieve_coordinator_node_lag_seconds", "shardsieve_coordinator_node_sync_received_bytes",
                     "shardsieve_coordinator_rebuild_requests", "shardsieve_coordinator_rpc_duration_seconds",
                     "shardsieve_coordinator_probe_duration_seconds"):
            assert name in metrics, name
        rebuilds = sum(s.value for s in metrics["shardsieve_coordinator_rebuild_requests"] if s.name.endswith("_total"))
        assert rebuilds == 1
        lookups = {s.labels.get("kind"): s.value for s in metrics["shardsieve_coordinator_lookups"]
                   if s.name.endswith("_total")}
        assert lookups == {"read": 1.0}          # the write's probes are probes, not lookups
        # Prometheus naming ("Metric and label naming"): latency histograms in seconds, per method
        calls = {s.labels["method"]: s.value for s in metrics["shardsieve_coordinator_rpc_duration_seconds"]
                 if s.name.endswith("_count")}
        assert calls.get("Write") == 1.0 and calls.get("Read") == 1.0
        delta_bytes = sum(s.value for s in metrics["shardsieve_coordinator_node_sync_received_bytes"]
                          if s.name.endswith("_total") and s.labels["kind"] == "delta")
        assert delta_bytes > 0

        # Standard gRPC health: SERVING (1) on the coordinator and each node.
        assert health_status(cluster.coordinator_address) == 1
        assert health_status(cluster.coordinator_address, "shardsieve.v1.Router") == 1
        assert all(health_status(addr) == 1 for addr in cluster.node_addresses.values())
        cluster.stop_coordinator()
        assert TOKEN not in (tmp_path / "coordinator.log").read_text()
