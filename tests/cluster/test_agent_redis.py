"""The Redis agent against a real redis-server (Debian package) on loopback.

Oracle (shardsieve.testing.agent_oracle): the keys the server really holds, read with SCAN
after the feed settled, as a plain Bloom filter: it must be covered by the agent's filter
and, since the ledger repairs every race it sees, equal to it. Redis behaviour relied on is
cited from its docs beside each test (keyspace notifications, client-side caching, SCAN).
"""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Iterator

import pytest

from shardsieve.node.adapters.applier import FeedApplier, FeedState, start_agent
from shardsieve.node.adapters.ledger import open_ledger
from shardsieve.node.core import NodeCore
from shardsieve.node.store import StoreError
from shardsieve.testing.agent_oracle import assert_filter_matches
from shardsieve.testing.procs import wait_until
from shardsieve.testing.servers import RedisServer, start_redis

pytestmark = pytest.mark.cluster
NOTIFY = {"notify-keyspace-events": "Egxen"}


@pytest.fixture
def server(tmp_path: Path) -> Iterator[RedisServer]:
    srv = start_redis(tmp_path, NOTIFY)
    yield srv
    srv.stop()


class Agent:
    def __init__(self, server: RedisServer, state_dir: Path, **options: object) -> None:
        from shardsieve.node.adapters.redis_store import RedisStore

        self.external = RedisStore(server.url(), **options)  # type: ignore[arg-type]
        self.ledger = open_ledger("memory", state_dir)
        self.core: NodeCore
        self.applier: FeedApplier
        self.core, self.applier = start_agent("brinewick-cache", self.external, self.ledger, capacity=50_000,
                                              target_fpr=0.01, background_rebuild=False)

    def settled_keys(self, server: RedisServer) -> set[bytes]:
        self.applier.settle(30.0)
        return {bytes(k) for k in server.client().scan_iter(count=1000)}

    def close(self) -> None:
        self.applier.stop()
        self.external.close()


@pytest.fixture
def agents(tmp_path: Path) -> Iterator[list[Agent]]:
    made: list[Agent] = []
    yield made
    for agent in made:
        agent.close()


def test_keys_written_before_and_during_the_first_listing(server: RedisServer, tmp_path: Path,
                                                          agents: list[Agent]) -> None:
    client = server.client()
    client.mset({f"harvest:{i}".encode(): b"sugar-kelp" for i in range(4000)})
    stop = threading.Event()

    def writer() -> None:   # adds and deletes while SCAN pages through the keys
        i = 0
        while not stop.is_set():
            client.set(f"crate:{i}", b"dulse")
            client.delete(f"harvest:{i}")
            i += 1

    thread = threading.Thread(target=writer)
    thread.start()
    try:
        agents.append(Agent(server, tmp_path, scan_count=20))
    finally:
        stop.set()
        thread.join()
    agent = agents[0]
    assert_filter_matches(agent.core, agent.settled_keys(server))
    assert agent.applier.counters.listings == 1


def test_expiries_evictions_renames_and_moves(server: RedisServer, tmp_path: Path, agents: list[Agent]) -> None:
    client = server.client()
    agents.append(agent := Agent(server, tmp_path))
    client.set(b"tide-log:short", b"x", px=50)
    client.hset(b"order:7", mapping={b"laver": b"3"})
    client.rename(b"order:7", b"order:8")                       # rename_from + new/rename_to
    other = server.client(db=1)
    other.set(b"customer:ula", b"1")
    other.move(b"customer:ula", 0)                              # arrives in db 0 (new/move_to)
    client.set(b"customer:tov", b"2")
    client.move(b"customer:tov", 1)                             # leaves db 0 (move_from)
    # expired: Redis removes a key whose TTL passed (actively or on access) with an `expired` event
    wait_until(lambda: client.exists(b"tide-log:short") == 0, 10.0, message="the short key expired")
    settled = agent.settled_keys(server)
    assert settled == {b"order:8", b"customer:ula"}
    assert_filter_matches(agent.core, settled)
    # evicted: with maxmemory reached under allkeys-random Redis evicts keys (`evicted` events)
    client.config_set("maxmemory-policy", "allkeys-random")
    client.config_set("maxmemory", str(int(client.info("memory")["used_memory"]) + 2_000_000))
    for i in range(200):
        client.set(f"crate:{i}", b"k" * 20_000)
    wait_until(lambda: int(client.info("stats")["evicted_keys"]) > 0, 10.0, message="evictions")
    client.config_set("maxmemory", "0")
    assert_filter_matches(agent.core, agent.settled_keys(server))
    assert agent.applier.counters.breaks == 0


def test_flushdb_flushall_and_swapdb_repair_the_filter(server: RedisServer, tmp_path: Path,
                                                       agents: list[Agent]) -> None:
    client = server.client()
    client.mset({f"harvest:{i}".encode(): b"1" for i in range(500)})
    agents.append(agent := Agent(server, tmp_path))
    # FLUSHDB sends no key event; client-side caching sends tracking clients a null
    # invalidation (Redis docs, "Client-side caching"), which starts a new listing.
    client.flushdb()
    client.set(b"after-flushdb", b"1")
    assert_filter_matches(agent.core, agent.settled_keys(server))
    client.mset({f"crate:{i}".encode(): b"1" for i in range(300)})
    client.flushall()
    client.set(b"after-flushall", b"1")
    assert_filter_matches(agent.core, settled := agent.settled_keys(server))
    assert settled == {b"after-flushall"}
    assert agent.applier.counters.breaks >= 2
    # SWAPDB sends nothing at all; the key-count audit taken with each mark notices it.
    server.client(db=1).mset({f"order:{i}".encode(): b"1" for i in range(40)})
    mismatches = agent.applier.counters.audit_mismatches   # an audit may have caught FLUSHALL first
    client.swapdb(0, 1)
    wait_until(lambda: agent.applier.counters.audit_mismatches > mismatches, 20.0,
               message="the audit noticed SWAPDB")
    settled = agent.settled_keys(server)
    assert len(settled) == 40
    assert_filter_matches(agent.core, settled)


def test_a_dropped_subscription_is_a_feed_break_and_a_relisting(server: RedisServer, tmp_path: Path,
                                                                agents: list[Agent]) -> None:
    client = server.client()
    client.mset({f"harvest:{i}".encode(): b"1" for i in range(1000)})
    agents.append(agent := Agent(server, tmp_path))
    breaks = agent.applier.counters.breaks
    client.execute_command("CLIENT", "KILL", "TYPE", "pubsub")
    client.mset({f"crate:{i}".encode(): b"1" for i in range(200)})     # possibly while unsubscribed
    client.delete(*[f"harvest:{i}".encode() for i in range(100)])
    wait_until(lambda: agent.applier.counters.breaks > breaks, 20.0, message="the break was reported")
    settled = agent.settled_keys(server)
    assert len(settled) == 1100
    assert_filter_matches(agent.core, settled)


def test_a_server_restart_changes_the_run_id_and_relists(server: RedisServer, tmp_path: Path,
                                                         agents: list[Agent]) -> None:
    client = server.client()
    client.mset({f"harvest:{i}".encode(): b"1" for i in range(300)})
    agents.append(agent := Agent(server, tmp_path))
    server.restart()                    # no persistence: the dataset is empty afterwards
    client = server.client()
    client.mset({f"tide-log:{i}".encode(): b"1" for i in range(50)})
    wait_until(lambda: "run_id" in agent.applier.last_listing_reason, 30.0,
               message=lambda: f"a listing after the restart (last: {agent.applier.last_listing_reason!r})")
    settled = agent.settled_keys(server)
    assert len(settled) == 50
    assert_filter_matches(agent.core, settled)


def test_an_agent_restarted_while_keys_were_written_lists_them_under_a_new_epoch(
        server: RedisServer, tmp_path: Path, agents: list[Agent]) -> None:
    client = server.client()
    agents.append(first := Agent(server, tmp_path))
    client.set(b"harvest:1", b"1")
    first.applier.settle()
    epoch = first.core.epoch
    first.close()
    agents.clear()
    client.mset({f"crate:{i}".encode(): b"1" for i in range(100)})    # while no agent watches
    agents.append(second := Agent(server, tmp_path))
    assert second.core.epoch > epoch, "the epoch comes from the local state file and only grows"
    assert_filter_matches(second.core, second.settled_keys(server))


def test_writes_routed_through_the_agent_are_routable_when_acknowledged(server: RedisServer, tmp_path: Path,
                                                                       agents: list[Agent]) -> None:
    agents.append(agent := Agent(server, tmp_path))
    stamp = agent.applier.write([(b"order:41", b"oarweed")])
    with agent.core.lock:
        assert agent.core.sync is not None and agent.core.sync.filter.contains(b"order:41")
    assert (stamp.epoch, stamp.sequence) >= (agent.core.epoch, 0)
    agent.applier.delete([b"order:41"])
    assert server.client().exists(b"order:41") == 0
    assert_filter_matches(agent.core, agent.settled_keys(server))


def test_probes_read_strings_as_bytes_and_other_types_as_their_dump(server: RedisServer, tmp_path: Path) -> None:
    from shardsieve.node.adapters.redis_store import RedisStore

    client = server.client()
    client.set(b"customer:ula", b"Ulavir")
    client.hset(b"farm:gullrock", mapping={b"product": b"dulse", b"lines": b"12"})
    store = RedisStore(server.url())
    try:
        value, dumped, missing = store.get_many([b"customer:ula", b"farm:gullrock", b"farm:none"])
    finally:
        store.close()
    assert value == b"Ulavir" and missing is None
    # The DUMP payload restores to the same hash (Redis docs, DUMP / RESTORE).
    client.restore(b"farm:copy", 0, dumped)
    assert client.hgetall(b"farm:copy") == client.hgetall(b"farm:gullrock")


def test_missing_notifications_are_refused_with_the_fix_or_configured_on_request(tmp_path: Path) -> None:
    from shardsieve.node.adapters.redis_store import RedisStore, missing_notify_flags

    srv = start_redis(tmp_path, {"notify-keyspace-events": "Kl"})
    try:
        with pytest.raises(StoreError, match="CONFIG SET notify-keyspace-events lKEgxen"):
            RedisStore(srv.url())
        assert srv.client().config_get("notify-keyspace-events")["notify-keyspace-events"] == "lK"
        RedisStore(srv.url(), configure_notifications=True).close()
        now = srv.client().config_get("notify-keyspace-events")["notify-keyspace-events"]
        assert missing_notify_flags(now) == "" and "l" in now and "K" in now
    finally:
        srv.stop()


def test_the_state_is_reported_while_the_store_is_down(server: RedisServer, tmp_path: Path,
                                                       agents: list[Agent]) -> None:
    agents.append(agent := Agent(server, tmp_path))
    server.stop()
    wait_until(lambda: agent.applier.state is FeedState.BROKEN, 20.0, message="the feed reported the outage")
    server.start()
    wait_until(lambda: agent.applier.state is FeedState.LIVE, 30.0, message="live again after the outage")
