"""Freshness on real processes: a coordinator restart mid-load, and a frozen node (SIGSTOP).

Oracle: the history of acknowledged writes recorded by the test (shardsieve.testing.history);
the rule checked is the store's promise that no acknowledged, undeleted key is reported absent
by a safe-mode read (docs/architecture.md#1-no-false-negatives-once-synced,
#2-read-your-writes-through-a-coordinator, #3-bounded-staleness).
"""

from __future__ import annotations

import random
import signal
import threading

import grpc
import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.history import History
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import admin_pb2, routing_pb2, storage_pb2

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(120)]


def _load(cluster: LocalCluster, history: History, stop: threading.Event, errors: list[str], seed: int) -> None:
    """Write through the coordinator and read back acknowledged keys until stopped."""
    rng = random.Random(seed)
    written: list[bytes] = []
    i = 0
    while not stop.is_set():
        router = cluster.router()
        try:
            if not written or rng.random() < 0.5:
                key, value = f"parcel-{seed}-{i}".encode(), f"route-{i}".encode()
                i += 1
                start = history.now()
                router.Write(routing_pb2.WriteRequest(key=key, value=value), timeout=5)
                history.write(key, value, start)
                written.append(key)
            else:
                key = rng.choice(written)
                start = history.now()
                reply = router.Read(routing_pb2.ReadRequest(key=key, deadline_ms=1000), timeout=5)
                history.read(key, reply.found, reply.value if reply.found else None, start)
        except grpc.RpcError as exc:
            # The coordinator is down for a moment: an error is an honest answer, not a miss.
            errors.append(exc.code().name)
        except ValueError as exc:
            # The restart closed the channel this stub was made on (grpc raises ValueError
            # "Cannot invoke RPC on closed channel!"): take a new one on the next round.
            if "closed channel" not in str(exc):
                raise
            errors.append("CLOSED_CHANNEL")


def test_coordinator_restart_mid_load_keeps_every_acknowledged_key(tmp_path) -> None:
    history = History()
    with LocalCluster(tmp_path, nodes=4, capacity=4000, push_interval_ms=50) as cluster:
        stop = threading.Event()
        errors: list[str] = []
        workers = [threading.Thread(target=_load, args=(cluster, history, stop, errors, s)) for s in range(2)]
        for w in workers:
            w.start()
        try:
            wait_until(lambda: history.counts().get("write", 0) >= 100, 20, message="100 writes before restart")
            before = history.counts().get("write", 0)
            cluster.restart_coordinator(kill=True, wait_in_sync=False)
            # Right after the restart the coordinator remembers every node (its state dir), so a node
            # without a replica yet is stale and listed in safe mode rather than unknown.
            status = cluster.fleet_status()
            assert {n.node_id for n in status.nodes} == set(cluster.node_handles)
            cluster.wait_in_sync(30)
            wait_until(lambda: history.counts().get("write", 0) >= before + 100, 20, message="100 writes after restart")
        finally:
            stop.set()
            for w in workers:
                w.join(10)
        # Every node resynced (a snapshot after the restart), and each acknowledged key is found.
        for n in cluster.fleet_status().nodes:
            assert n.snapshots >= 1 and n.state == "in-sync"
        router = cluster.router()
        for key, value in history.live_keys().items():
            start = history.now()
            reply = router.Read(routing_pb2.ReadRequest(key=key), timeout=10)
            history.read(key, reply.found, reply.value if reply.found else None, start)
        history.assert_ok()
        assert history.counts().get("read", 0) > 200


def test_frozen_node_turns_stale_listed_in_safe_mode_only(tmp_path) -> None:
    with LocalCluster(tmp_path, nodes=4, capacity=2000, push_interval_ms=50,
                      extra_coordinator_args=["--stale-after-s", "1"]) as cluster:
        router = cluster.router()
        admin = cluster.admin()
        cluster.storage("node-3").Put(storage_pb2.PutRequest(key=b"crate-9", value=b"dock-4"), timeout=5)
        wait_until(lambda: any(c.node_id == "node-3" for c in router.Locate(
            routing_pb2.LocateRequest(key=b"crate-9"), timeout=5).candidates), 10, message="crate-9 routable")
        cluster.storage("node-1").Put(storage_pb2.PutRequest(key=b"crate-1", value=b"dock-2"), timeout=5)
        wait_until(lambda: any(c.node_id == "node-1" for c in router.Locate(
            routing_pb2.LocateRequest(key=b"crate-1"), timeout=5).candidates), 10, message="crate-1 routable")
        absent = [f"never-{i}".encode() for i in range(50)]

        def listed(key: bytes) -> list[routing_pb2.Candidate]:
            return [c for c in router.Locate(routing_pb2.LocateRequest(key=key), timeout=5).candidates
                    if c.node_id == "node-3"]

        assert sum(bool(listed(k)) for k in absent) < 10    # fresh: listed only on filter matches
        proc = cluster.node_process("node-3")
        proc.signal(signal.SIGSTOP)
        try:
            cluster.wait_node_state("node-3", lambda n: n.stale, timeout=10, what="stale")
            # Safe mode: the stale node is on every candidate list, marked stale.
            for key in absent:
                c = listed(key)
                assert c and c[0].stale
            # First hit wins (docs/coordinator.md, "Freshness contract"): crate-1's read also probes the frozen node (listed stale),
            # whose probe would only end at the 60 s read deadline; the answer comes from node-1 well
            # within the 10 s call deadline, so the read did not wait for every probe.
            reply = router.Read(routing_pb2.ReadRequest(key=b"crate-1", deadline_ms=60_000), timeout=10)
            assert reply.found and reply.node_id == "node-1" and reply.value == b"dock-2"
            assert reply.candidates >= 2      # node-3 was on the list too
            # A read of its key cannot be answered: UNAVAILABLE naming the node, never a wrong not-found.
            # The request's read deadline (300 ms) applies, not the 2 s default: the answer arrives
            # inside a 1.5 s call deadline (else the client would see DEADLINE_EXCEEDED).
            with pytest.raises(grpc.RpcError) as err:
                router.Read(routing_pb2.ReadRequest(key=b"crate-9", deadline_ms=300), timeout=1.5)
            assert err.value.code() == grpc.StatusCode.UNAVAILABLE and "node-3" in err.value.details()
            # Fast mode: stale nodes are left out of lists their filter does not match.
            admin.SetPolicy(admin_pb2.PolicySetRequest(values={"mode": "fast"}), timeout=5)
            assert sum(bool(listed(k)) for k in absent) < 10
            # Its replica still routes the keys it had (stale flag set).
            assert listed(b"crate-9")[0].stale
            admin.SetPolicy(admin_pb2.PolicySetRequest(values={"mode": "safe"}), timeout=5)
        finally:
            proc.signal(signal.SIGCONT)
        cluster.wait_in_sync(20)
        reply = router.Read(routing_pb2.ReadRequest(key=b"crate-9"), timeout=10)
        assert reply.found and reply.value == b"dock-4" and reply.node_id == "node-3"
