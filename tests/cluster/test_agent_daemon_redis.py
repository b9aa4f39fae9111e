"""`shardsieve agent` on a real redis-server, under a real coordinator, with a SQLite node beside it.

Applications write Redis directly (redis-py); the oracle is the keys Redis really holds
(SCAN), each of which the coordinator must list with the agent (shardsieve.testing.agent_oracle,
`not_routed_to`: a key missing is a false negative). Redis behaviour relied on, cited from its
docs: keyspace notifications are fire and forget (a killed subscriber misses what happened
meanwhile, "Keyspace notifications"); `CLIENT KILL TYPE pubsub` closes subscriber connections
("CLIENT KILL"); a restarted server has a new run_id ("INFO"); FLUSHDB sends no key events but
a null invalidation to tracking clients ("Client-side caching"). The coordinator's safe mode
lists a node whose sync stream is down as stale (docs/coordinator.md, "Freshness contract").
"""

from __future__ import annotations

import subprocess
import threading
from pathlib import Path
from typing import Iterator

import grpc
import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.agent_oracle import not_routed_to, scrape
from shardsieve.testing.procs import free_port, shardsieve_argv, wait_until
from shardsieve.testing.servers import RedisServer, start_redis
from shardsieve.v1 import routing_pb2, storage_pb2

pytestmark = pytest.mark.cluster
AGENT = "brinewick-cache"
NOTIFY = {"notify-keyspace-events": "Egxen"}


@pytest.fixture
def redis_server(tmp_path: Path) -> Iterator[RedisServer]:
    server = start_redis(tmp_path, NOTIFY)
    yield server
    server.stop()


class Fleet:
    def __init__(self, tmp_path: Path, redis_server: RedisServer) -> None:
        self.redis = redis_server
        self.metrics_port = free_port()
        self.cluster = LocalCluster(tmp_path / "fleet", nodes=1, capacity=20_000, push_interval_ms=50,
                                    heartbeat_ms=200, extra_coordinator_args=["--stale-after-s", "1"],
                                    agents={AGENT: ["--store", redis_server.url(),
                                                    "--metrics-port", str(self.metrics_port)]})

    def status(self):  # type: ignore[no-untyped-def]
        return next(n for n in self.cluster.fleet_status().nodes if n.node_id == AGENT)

    def redis_keys(self) -> list[bytes]:
        return sorted(bytes(k) for k in self.redis.client().scan_iter(count=1000))

    def wait_all_routed(self, timeout: float = 20.0) -> None:
        """Every key Redis holds lists the agent (no false negative), within the deadline."""
        wait_until(lambda: not not_routed_to(self.cluster.router(), self.redis_keys(), AGENT), timeout,
                   message=lambda: f"every Redis key routed to the agent; missing "
                                   f"{not_routed_to(self.cluster.router(), self.redis_keys(), AGENT)[:5]}")

    def wait_epoch_above(self, epoch: int, timeout: float = 30.0):  # type: ignore[no-untyped-def]
        return self.cluster.wait_node_state(AGENT, lambda n: n.epoch > epoch and n.state == "fresh", timeout,
                                            f"a verified epoch above {epoch}")

    def agent_log(self) -> str:
        return self.cluster.node_process(AGENT).log_text()


@pytest.fixture
def fleet(tmp_path: Path, redis_server: RedisServer) -> Iterator[Fleet]:
    redis_server.client().mset({f"harvest:gullrock:{i}".encode(): b"sugar-kelp 40 kg" for i in range(800)})
    made = Fleet(tmp_path, redis_server)
    made.cluster.start()
    try:
        yield made
    finally:
        made.cluster.stop()


def test_application_writes_are_routable_and_routed_writes_land_in_redis(fleet: Fleet) -> None:
    client, router = fleet.redis.client(), fleet.cluster.router()
    assert not not_routed_to(router, fleet.redis_keys(), AGENT)          # the first listing
    client.mset({f"crate:{i}".encode(): b"dulse 12 kg" for i in range(300)})
    client.hset(b"tally:north-bed", mapping={b"kg": b"40"})              # any type: its key counts
    fleet.wait_all_routed()

    # A write routed through the coordinator: in Redis, and routable at once (read-your-writes).
    reply = router.Write(routing_pb2.WriteRequest(key=b"crate:new", value=b"laver 7 kg", node_id=AGENT), timeout=15)
    assert reply.node_id == AGENT and reply.created
    assert client.get(b"crate:new") == b"laver 7 kg"
    assert AGENT in {c.node_id for c in router.Locate(routing_pb2.LocateRequest(key=b"crate:new")).candidates}
    read = router.Read(routing_pb2.ReadRequest(key=b"crate:new"), timeout=10)
    assert read.found and read.value == b"laver 7 kg" and read.node_id == AGENT
    again = router.Write(routing_pb2.WriteRequest(key=b"crate:new", value=b"laver 8 kg", node_id=AGENT), timeout=15)
    assert not again.created and client.get(b"crate:new") == b"laver 8 kg"
    removed = router.Remove(routing_pb2.RemoveRequest(key=b"crate:new"), timeout=15)
    assert AGENT in removed.node_ids and client.exists(b"crate:new") == 0

    # Probes read Redis; the node's limits apply to the agent's storage API as well.
    storage = fleet.cluster.storage(AGENT)
    assert storage.Get(storage_pb2.GetRequest(key=b"crate:7"), timeout=5).value == b"dulse 12 kg"
    with pytest.raises(grpc.RpcError) as refused:
        storage.Put(storage_pb2.PutRequest(key=b"k" * 1025, value=b"v"), timeout=5)
    assert refused.value.code() == grpc.StatusCode.INVALID_ARGUMENT and "max-key-bytes" in refused.value.details()
    # The coordinator's replica counts exactly the keys Redis holds.
    wait_until(lambda: fleet.status().key_count == fleet.redis.client().dbsize(), 10, message="key counts equal")


def test_a_dropped_subscription_holds_the_streams_and_ends_in_a_new_epoch(fleet: Fleet) -> None:
    client = fleet.redis.client()
    before = fleet.status()
    stop = threading.Event()

    def application() -> None:   # keeps writing across the break: keys it adds may miss their events
        i = 0
        writer = fleet.redis.client()
        while not stop.is_set():
            writer.set(f"crate:during:{i}".encode(), b"dulse")
            i += 1

    thread = threading.Thread(target=application)
    thread.start()
    try:
        wait_until(lambda: client.dbsize() > 1000, 10, message="the application writing")
        killed = client.execute_command("CLIENT", "KILL", "TYPE", "pubsub")
        assert killed >= 1
        fleet.wait_epoch_above(before.epoch)
    finally:
        stop.set()
        thread.join()
    fleet.wait_all_routed()
    figures = scrape(fleet.metrics_port)
    assert figures["shardsieve_agent_feed_breaks_total"] >= 1
    assert figures["shardsieve_agent_rebuilds_after_break_total"] >= 1
    # The stream was held (closed) and opened again: two connects or more.
    assert figures["shardsieve_node_coordinator_connects_total"] >= 2
    assert "sync stream held" in fleet.agent_log()


def test_while_redis_is_down_the_agent_is_stale_and_a_restarted_server_is_listed_again(fleet: Fleet) -> None:
    router = fleet.cluster.router()
    before = fleet.status()
    fleet.redis.stop()

    def listed_stale() -> bool:
        cands = router.Locate(routing_pb2.LocateRequest(key=b"no-such-crate"), timeout=5).candidates
        return any(c.node_id == AGENT and c.stale for c in cands)

    wait_until(listed_stale, 15, message="safe mode listing the agent as stale for any key")
    fleet.redis.start()          # a new run_id, no keys (no persistence)
    client = fleet.redis.client()
    client.mset({f"crate:after:{i}".encode(): b"laver" for i in range(200)})
    status = fleet.wait_epoch_above(before.epoch)
    fleet.wait_all_routed()
    wait_until(lambda: fleet.status().key_count == 200, 15, message="the old keys swept, the new ones counted")
    assert status.epoch > before.epoch


def test_flushdb_empties_the_filter_through_the_daemon(fleet: Fleet) -> None:
    client = fleet.redis.client()
    before = fleet.status()
    assert before.key_count == 800
    client.flushdb()
    wait_until(lambda: fleet.status().key_count == 0, 20, message="the flushed keys uncounted at the coordinator")
    client.set(b"crate:after-flush", b"dulse")
    fleet.wait_all_routed()
    assert fleet.wait_epoch_above(before.epoch).key_count == 1


def test_a_key_written_while_the_agent_is_stopped_is_routable_after_it_restarts(fleet: Fleet) -> None:
    before = fleet.status()
    fleet.cluster.stop_node(AGENT)
    fleet.redis.client().set(b"crate:while-away", b"sugar-kelp")
    fleet.cluster.start_node(AGENT)
    fleet.wait_epoch_above(before.epoch)
    assert not not_routed_to(fleet.cluster.router(), [b"crate:while-away"], AGENT)
    fleet.wait_all_routed()


def test_missing_notification_classes_exit_4_with_the_fix_unless_configured(tmp_path: Path) -> None:
    bare = start_redis(tmp_path / "bare")            # notify-keyspace-events left empty
    try:
        argv = shardsieve_argv("agent", "--id", "salt-shed", "--store", bare.url(), "--listen",
                               f"127.0.0.1:{free_port()}", "--state-dir", str(tmp_path / "state"),
                               "--allow-plaintext", "true", "--log-format", "text")
        done = subprocess.run(argv, capture_output=True, text=True, timeout=60)
        assert done.returncode == 4, done.stderr
        lines = done.stderr.strip().splitlines()
        assert len(lines) == 1 and "CONFIG SET notify-keyspace-events Egxen" in lines[0]
        assert bare.client().config_get("notify-keyspace-events")["notify-keyspace-events"] == ""

        port = free_port()
        argv = [*argv[:argv.index("--listen") + 1], f"127.0.0.1:{port}", *argv[argv.index("--listen") + 2:],
                "--configure-notifications", "true"]
        from shardsieve.testing.procs import start_daemon

        proc = start_daemon(argv, tmp_path / "configured.log", health_address=f"127.0.0.1:{port}")
        try:
            flags = bare.client().config_get("notify-keyspace-events")["notify-keyspace-events"]
            assert set("Egxen") <= set(flags)
        finally:
            assert proc.stop() == 0
    finally:
        bare.stop()
