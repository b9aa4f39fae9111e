"""Every metric the alerting rules and the dashboard (compose/monitoring/) query is one the
daemons really export: a live scrape of a coordinator and a node after some traffic, parsed with
prometheus_client's own text-format parser."""

from __future__ import annotations

import urllib.request
from pathlib import Path

import grpc
import pytest
from prometheus_client.parser import text_string_to_metric_families

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import free_port, wait_until
from shardsieve.v1 import admin_pb2, routing_pb2
from tests.unit.test_monitoring_files import metric_names_used

pytestmark = pytest.mark.cluster


def scrape(port: int) -> set[str]:
    text = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read().decode()
    names = set()
    for family in text_string_to_metric_families(text):
        names.add(family.name)
        names.update(sample.name for sample in family.samples)
    return names


def test_rules_and_dashboard_query_only_exported_metrics(tmp_path: Path) -> None:
    node_port = free_port()
    with LocalCluster(tmp_path / "fleet", nodes=1, node_ids=["tide-1"], capacity=500, metrics=True,
                      extra_node_args=["--metrics-port", str(node_port)],
                      extra_coordinator_args=["--auto-rebuild", "false"]) as cluster:
        router = cluster.router()
        router.Write(routing_pb2.WriteRequest(key=b"buoy-4", value=b"red"), timeout=5)
        router.Read(routing_pb2.ReadRequest(key=b"buoy-4"), timeout=5)
        router.Read(routing_pb2.ReadRequest(key=b"buoy-none"), timeout=5)
        router.Locate(routing_pb2.LocateRequest(key=b"buoy-4"), timeout=5)
        with pytest.raises(grpc.RpcError):                  # an empty key: an error answer, counted by code
            router.Read(routing_pb2.ReadRequest(key=b""), timeout=5)
        cluster.admin().Rebuild(admin_pb2.RebuildCommand(node_ids=["tide-1"], capacity=800),
                                metadata=cluster.auth_metadata(), timeout=5)
        exported = wait_until(lambda: (n := scrape(cluster.coordinator_metrics_port) | scrape(node_port))
                              and "shardsieve_coordinator_rpc_duration_seconds_count" in n and n, 15,
                              message="both daemons export their metrics")
    used = metric_names_used()
    assert used, "the rules and the dashboard query no metric"
    missing = {name for name in used if name not in exported and f"{name}_total" not in exported}
    assert missing == set(), f"queried but not exported: {sorted(missing)}"
