"""Freshness on real processes: a coordinator restart mid-load, and a frozen node (SIGSTOP).

Oracle: the history of acknowledged writes recorded by the test (shardsieve.testing.history);
the rule checked is that no acknowledged, undeleted key is reported absent by a safe-mode read
(docs/architecture.md#1-no-false-negatives-once-synced, #2-read-your-writes-through-a-coordinator,
#3-bounded-staleness: safe mode lists every stale node in every candidate list).
"""

from __future__ import annotations

import random
import signal
import threading
from dataclasses import dataclass

import grpc
import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.history import History
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import admin_pb2, routing_pb2, storage_pb2

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(180)]

HELD_BACK = "node-2"        # the node frozen across the coordinator restart
HELD_BACK_KEYS = 12         # acknowledged keys on it before it is frozen


@dataclass(frozen=True)
class CallError:
    """A failed call of the load: when it ran, and what the coordinator (or gRPC) said."""

    start: float
    end: float
    code: str
    details: str

    def overlaps(self, window: tuple[float, float]) -> bool:
        return self.start <= window[1] and self.end >= window[0]


def _load(cluster: LocalCluster, history: History, stop: threading.Event, errors: list[CallError],
          crashes: list[BaseException], seed: int) -> None:
    """Write through the coordinator and read back acknowledged keys until stopped."""
    rng = random.Random(seed)
    written: list[bytes] = []
    i = 0
    try:
        while not stop.is_set():
            start = history.now()
            try:
                router = cluster.router()
                if not written or rng.random() < 0.5:
                    key, value = f"parcel-{seed}-{i}".encode(), f"route-{i}".encode()
                    i += 1
                    # The call deadline (10 s) is above the coordinator's own (2 s pre-probe + 5 s
                    # write), so a node that cannot be asked is reported by the coordinator by name.
                    reply = router.Write(routing_pb2.WriteRequest(key=key, value=value), timeout=10)
                    history.write(key, value, start, node_id=reply.node_id)
                    written.append(key)
                else:
                    key = rng.choice(written)
                    reply = router.Read(routing_pb2.ReadRequest(key=key, deadline_ms=1000), timeout=10)
                    history.read(key, reply.found, reply.value if reply.found else None, start)
            except grpc.RpcError as exc:
                # An error is an honest answer, not a miss; the test checks each one below.
                errors.append(CallError(start, history.now(), exc.code().name, exc.details() or ""))
                stop.wait(0.02)    # pacing while the coordinator is away, not synchronisation
            except ValueError as exc:
                if "closed channel" not in str(exc):
                    raise
                # The test closed the coordinator channel under this call (restart).
                errors.append(CallError(start, history.now(), "CLOSED_CHANNEL", str(exc)))
    except BaseException as exc:   # noqa: BLE001 - reported by the test, never swallowed
        crashes.append(exc)


def test_coordinator_restart_mid_load_keeps_every_acknowledged_key(tmp_path) -> None:
    """The restarted coordinator reads before a frozen node resynced: certain, not a race.

    The node is frozen (SIGSTOP) before the coordinator is killed, so the restarted coordinator
    has no replica of it and no hints, and knows it only from its state dir. Every read of the
    node's keys in that window must list it (stale) and fail naming it; a coordinator that left
    stale nodes out (fast mode behaviour) would answer "not found" for every one of them.
    """
    history = History()
    with LocalCluster(tmp_path, nodes=4, capacity=4000, push_interval_ms=50) as cluster:
        stop = threading.Event()
        errors: list[CallError] = []
        crashes: list[BaseException] = []
        workers = [threading.Thread(target=_load, args=(cluster, history, stop, errors, crashes, s))
                   for s in range(2)]
        for w in workers:
            w.start()
        try:
            def held_back_keys() -> list[bytes]:
                return history.keys_written_on(HELD_BACK)

            wait_until(lambda: history.counts().get("write", 0) >= 100 and len(held_back_keys()) >= HELD_BACK_KEYS,
                       30, message=f"100 writes before the restart, {HELD_BACK_KEYS} of them on {HELD_BACK}")
            before = history.counts().get("write", 0)

            cluster.freeze_node(HELD_BACK)
            frozen_at = history.now()
            try:
                killed_at = history.now()
                cluster.restart_coordinator(kill=True, wait_fresh=False)   # returns once it is SERVING
                serving_at = history.now()
                # It remembers every node (its state dir): the frozen one is known and stale.
                status = {n.node_id: n for n in cluster.fleet_status().nodes}
                assert set(status) == set(cluster.node_handles)
                assert status[HELD_BACK].stale and not status[HELD_BACK].connected
                others = [n for n in cluster.node_handles if n != HELD_BACK]
                cluster.wait_fresh(30, node_ids=others)
                # The window that matters: the frozen node cannot have resynced, so only safe mode
                # keeps its keys reachable. Each is listed (stale), and its read fails naming the node.
                router = cluster.router()
                keys = held_back_keys()[:HELD_BACK_KEYS]
                for key in keys:
                    listed = [c for c in router.Locate(routing_pb2.LocateRequest(key=key), timeout=5).candidates
                              if c.node_id == HELD_BACK]
                    assert listed and listed[0].stale, f"{key!r}: {HELD_BACK} is not on its candidate list"
                    start = history.now()
                    try:
                        reply = router.Read(routing_pb2.ReadRequest(key=key, deadline_ms=300), timeout=5)
                    except grpc.RpcError as exc:
                        assert exc.code() == grpc.StatusCode.UNAVAILABLE and HELD_BACK in (exc.details() or ""), \
                            (key, exc.code(), exc.details())
                    else:
                        history.read(key, reply.found, reply.value if reply.found else None, start)
                        pytest.fail(f"{key!r} on frozen {HELD_BACK} answered found={reply.found} "
                                    f"from {reply.node_id or 'no node'}; expected UNAVAILABLE naming {HELD_BACK}")
            finally:
                cluster.thaw_node(HELD_BACK)
            cluster.wait_fresh(30)
            back_at = history.now()
            wait_until(lambda: history.counts().get("write", 0) >= before + 100, 30,
                       message="100 writes after the restart")
        finally:
            stop.set()
            for w in workers:
                w.join(15)
        assert not crashes, crashes
        assert not any(w.is_alive() for w in workers), "a load thread did not stop"

        # Every error of the load is explained by what the test did, and names who was unreachable.
        # While the coordinator was down: gRPC's UNAVAILABLE naming the coordinator's address, a call
        # the kill cut off ("Socket closed" / "Connection reset", gRPC's wording), or one on the
        # channel the test closed for the restart. While the frozen node was out: the coordinator's
        # UNAVAILABLE naming that node (docs/coordinator.md, "Freshness contract"). Nothing else.
        down = (killed_at, serving_at)
        held = (frozen_at, back_at)

        def explained(e: CallError) -> bool:
            if e.overlaps(down):
                if e.code == "UNAVAILABLE" and (cluster.coordinator_address in e.details
                                                or "Socket closed" in e.details or "Connection reset" in e.details):
                    return True
                if (e.code, e.details) == ("CANCELLED", "Channel closed!") or e.code == "CLOSED_CHANNEL":
                    return True
            return e.overlaps(held) and e.code == "UNAVAILABLE" and HELD_BACK in e.details

        unexpected = [e for e in errors if not explained(e)]
        assert not unexpected, unexpected[:5]
        assert any(HELD_BACK in e.details for e in errors), "the load never hit the frozen node"
        named = [e for e in errors if HELD_BACK in e.details]
        print(f"load errors: {len(errors)}, {len(named)} of them naming {HELD_BACK}")

        # Every node resynced (a snapshot after the restart), and each acknowledged key is found.
        for n in cluster.fleet_status().nodes:
            assert n.snapshots >= 1 and n.state == "fresh"
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
        cluster.wait_fresh(20)
        reply = router.Read(routing_pb2.ReadRequest(key=b"crate-9"), timeout=10)
        assert reply.found and reply.value == b"dock-4" and reply.node_id == "node-3"
