"""Coordinator routing on real processes: 1 coordinator + 4 nodes on loopback.

Writes go directly to nodes and through the coordinator; deletes, overwrites and reads follow.
Oracle for every assertion: the history of acknowledged operations this test recorded itself
(shardsieve.testing.history), and the nodes' own counters (NodeStorage.Stats) for wasted probes.
"""

from __future__ import annotations

import random
import urllib.request

import grpc
import pytest
from prometheus_client.parser import text_string_to_metric_families

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.history import History
from shardsieve.testing.nodes import reference_filter
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import admin_pb2, routing_pb2, storage_pb2

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(120)]


def _read(router, history: History, key: bytes) -> routing_pb2.ReadReply:
    start = history.now()
    reply = router.Read(routing_pb2.ReadRequest(key=key), timeout=10)
    history.read(key, reply.found, reply.value if reply.found else None, start, node_id=reply.node_id)
    return reply


def test_reads_writes_deletes_and_wasted_probes(tmp_path) -> None:
    rng = random.Random(7)
    history = History()
    # A deliberately loose filter (fpr 0.2, small capacity) so that false positives, and so
    # wasted probes, actually occur in a short run.
    with LocalCluster(tmp_path, nodes=4, capacity=400, fpr=0.2, push_interval_ms=50, metrics=True,
                      extra_coordinator_args=["--min-capacity", "100", "--auto-rebuild", "false",
                                              "--locate-threads", "2"]) as cluster:
        router = cluster.router()
        node_ids = sorted(cluster.node_handles)

        # 1. Writes through the coordinator: read-your-writes, immediately after each ack.
        for i in range(150):
            key, value = f"acct-{i:04d}".encode(), f"balance-{i}".encode()
            start = history.now()
            ack = router.Write(routing_pb2.WriteRequest(key=key, value=value), timeout=10)
            history.write(key, value, start, node_id=ack.node_id)
            reply = _read(router, history, key)
            assert reply.found and reply.value == value, f"read-your-writes failed for {key!r}"

        # 2. Writes made directly on nodes become routable within push interval + network delay.
        direct: dict[bytes, str] = {}
        for i in range(120):
            nid = node_ids[i % 4]
            key, value = f"sku-{i:04d}".encode(), f"shelf-{i}".encode()
            start = history.now()
            cluster.storage(nid).Put(storage_pb2.PutRequest(key=key, value=value), timeout=10)
            history.write(key, value, start, node_id=nid, via="node")
            direct[key] = nid

        def routable() -> bool:
            replies = router.LocateBatch(routing_pb2.LocateBatchRequest(keys=list(direct)), timeout=10).results
            return all(any(c.node_id == direct[k] for c in r.candidates) for k, r in zip(direct, replies))

        wait_until(routable, timeout=10, message="directly written keys routable")
        # A batch large enough to be matched in slices on two threads answers exactly as the
        # same keys asked in batches of 1,000 (matched on the calling thread).
        # (Retried: a node turning stale between the two calls would change both lists.)
        big = list(direct) + [f"absent-{i:05d}".encode() for i in range(20_000)]

        def lists(results: list) -> list[list[tuple[str, bool]]]:
            return [[(c.node_id, c.stale) for c in r.candidates] for r in results]

        def big_batch_agrees() -> list | None:
            whole = router.LocateBatch(routing_pb2.LocateBatchRequest(keys=big), timeout=30).results
            pieces = [r for lo in range(0, len(big), 1000) for r in router.LocateBatch(
                routing_pb2.LocateBatchRequest(keys=big[lo:lo + 1000]), timeout=10).results]
            return list(whole) if lists(whole) == lists(pieces) else None

        whole = wait_until(big_batch_agrees, timeout=30, message="large batch agrees with small batches")
        assert all(any(c.node_id == direct[k] for c in r.candidates) for k, r in zip(direct, whole))
        for key in direct:
            reply = _read(router, history, key)
            assert reply.found and reply.node_id == direct[key]

        # 3. Overwrites through the coordinator land where the key lives (no duplicate elsewhere).
        for i in range(0, 150, 5):
            key, value = f"acct-{i:04d}".encode(), f"balance-{i}-v2".encode()
            start = history.now()
            ack = router.Write(routing_pb2.WriteRequest(key=key, value=value), timeout=10)
            history.write(key, value, start, node_id=ack.node_id)
            assert not ack.created
            assert _read(router, history, key).value == value

        # 4. Deletes through the coordinator and directly on a node.
        deleted = [f"acct-{i:04d}".encode() for i in range(1, 150, 7)]
        for key in deleted:
            start = history.now()
            removed = router.Remove(routing_pb2.RemoveRequest(key=key), timeout=10).node_ids
            history.delete(key, start)
            assert len(removed) == 1
        for key in list(direct)[:20]:
            start = history.now()
            cluster.storage(direct[key]).Delete(storage_pb2.DeleteRequest(key=key), timeout=10)
            history.delete(key, start, via="node")
        for key in deleted:
            assert not _read(router, history, key).found

        # 5. Reads of live keys, and of keys never written (these produce the wasted probes).
        live = history.live_keys()
        for key in rng.sample(sorted(live), 100):
            reply = _read(router, history, key)
            assert reply.found and reply.value == live[key]
        for i in range(400):
            _read(router, history, f"absent-{i}".encode())

        history.assert_ok()

        # Every Get a node served in this test came from the coordinator: the misses the nodes
        # counted themselves equal the coordinator's wasted probes of every kind (its probe
        # metric: reads, and the existence checks of writes), and each node's wasted probes in
        # the read accounting (reads only: a write's probes are not lookups) are at most its
        # misses. Probes still in flight after a first hit are accounted when they finish: wait.
        url = f"http://127.0.0.1:{cluster.coordinator_metrics_port}/metrics"

        def wasted_metric() -> float:
            text = urllib.request.urlopen(url, timeout=5).read().decode()
            return sum(s.value for f in text_string_to_metric_families(text) if f.name == "shardsieve_coordinator_probes"
                       for s in f.samples if s.name.endswith("_total") and s.labels.get("outcome") == "wasted")

        def counts_match() -> bool:
            status = {n.node_id: n for n in cluster.fleet_status().nodes}
            missed = {nid: cluster.node_stats(nid).reads_missed for nid in node_ids}
            return wasted_metric() == sum(missed.values()) and all(
                status[nid].wasted_probes <= missed[nid] for nid in node_ids)

        wait_until(counts_match, timeout=10, message="coordinator wasted probes == node reads_missed")
        fleet = cluster.fleet_status()
        assert fleet.wasted_probes > 0, "the loose filter should have produced false positives"
        # Avoided fan-out by definition: 1 - probes / (lookups x nodes) (docs/architecture.md#words).
        assert fleet.avoided_fanout == pytest.approx(1 - fleet.probes / (fleet.lookups * 4))
        assert fleet.avoided_fanout > 0.5

        # Each replica equals, checksum for checksum, a filter built from scratch over the node's
        # keys (the node counts deleted keys out exactly; nothing saturated at this fill).
        def replicas_exact() -> bool:
            status = {n.node_id: n for n in cluster.fleet_status().nodes}
            return all(status[nid].checksum == reference_filter(cluster.storage(nid)).checksum for nid in node_ids)

        wait_until(replicas_exact, timeout=10, message="replica checksums equal the nodes' reference filters")


def test_read_fails_unavailable_rather_than_wrong_not_found(tmp_path) -> None:
    with LocalCluster(tmp_path, nodes=4, capacity=400, push_interval_ms=50) as cluster:
        router = cluster.router()
        ack = router.Write(routing_pb2.WriteRequest(key=b"order-77", value=b"packed", node_id="node-2"), timeout=10)
        assert ack.node_id == "node-2"
        cluster.stop_node("node-2", kill=True)
        with pytest.raises(grpc.RpcError) as err:
            router.Read(routing_pb2.ReadRequest(key=b"order-77", deadline_ms=500), timeout=10)
        assert err.value.code() == grpc.StatusCode.UNAVAILABLE and "node-2" in err.value.details()
        # The admin API shows it disconnected.
        status = cluster.admin().NodeDetail(admin_pb2.NodeDetailRequest(node_id="node-2"), timeout=5).status
        wait_until(lambda: cluster.admin().NodeDetail(admin_pb2.NodeDetailRequest(node_id="node-2"),
                                                      timeout=5).status.state == "disconnected", 10)
        assert status.node_id == "node-2"
