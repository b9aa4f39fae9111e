"""`shardsieve agent` on a real PostgreSQL 15 table, under a real coordinator, and `agent-retire`.

Applications write the table directly (psycopg2); the oracle is the keys the table really
holds (SELECT), each of which the coordinator must list with the agent
(shardsieve.testing.agent_oracle, `not_routed_to`). PostgreSQL behaviour relied on, cited
from its docs: a replication slot keeps every change after its confirmed position while its
consumer is away ("Replication Slots"), so changes made while the agent is down arrive
without a listing; TRUNCATE is decoded as its own message ("Logical Replication Message
Formats"); a dropped slot is gone with its position ("pg_drop_replication_slot").
"""

from __future__ import annotations

import itertools
import subprocess
from pathlib import Path
from typing import Iterator

import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.agent_oracle import not_routed_to, scrape
from shardsieve.testing.procs import free_port, shardsieve_argv, wait_until
from shardsieve.testing.servers import PostgresServer, harvest_database, start_postgres
from shardsieve.v1 import routing_pb2

pytestmark = pytest.mark.cluster
AGENT = "gullrock-ledger"
ROLE = "kelp_agent"
_databases = itertools.count(1)


@pytest.fixture(scope="module")
def pg() -> Iterator[PostgresServer]:
    server = start_postgres()
    server.execute(f"CREATE ROLE {ROLE} LOGIN REPLICATION")
    yield server
    server.remove()


@pytest.fixture
def db(pg: PostgresServer) -> str:
    """A fresh database with the cooperative's harvest table, owned by the agent's role."""
    name = harvest_database(pg, f"ledger_{next(_databases)}", ROLE)
    pg.execute("INSERT INTO harvest SELECT 'bed-' || g, 'sugar-kelp' FROM generate_series(1, 600) g", dbname=name)
    return name


class Fleet:
    def __init__(self, tmp_path: Path, pg: PostgresServer, db: str) -> None:
        self.pg, self.db = pg, db
        self.url = pg.url(db, ROLE, table="harvest", key="tag", value="note")
        self.metrics_port = free_port()
        self.cluster = LocalCluster(tmp_path / "fleet", nodes=1, capacity=20_000, heartbeat_ms=200,
                                    extra_coordinator_args=["--stale-after-s", "1"],
                                    agents={AGENT: ["--store", self.url, "--metrics-port", str(self.metrics_port)]})

    def sql(self, statement: str, params: tuple = ()) -> list[tuple]:
        return self.pg.execute(statement, params, dbname=self.db)

    def table_keys(self) -> list[bytes]:
        return sorted(str(r[0]).encode() for r in self.sql("SELECT tag FROM harvest"))

    def status(self):  # type: ignore[no-untyped-def]
        return next(n for n in self.cluster.fleet_status().nodes if n.node_id == AGENT)

    def wait_all_routed(self, timeout: float = 20.0) -> None:
        wait_until(lambda: not not_routed_to(self.cluster.router(), self.table_keys(), AGENT), timeout,
                   message=lambda: f"every row's key routed to the agent; missing "
                                   f"{not_routed_to(self.cluster.router(), self.table_keys(), AGENT)[:5]}")

    def wait_counted(self, timeout: float = 20.0) -> None:
        wait_until(lambda: self.status().key_count == len(self.table_keys()), timeout,
                   message=lambda: f"the coordinator counting {len(self.table_keys())} keys "
                                   f"(has {self.status().key_count})")

    def slots(self) -> list[str]:
        return [r[0] for r in self.pg.execute("SELECT slot_name FROM pg_replication_slots WHERE database = %s",
                                              (self.db,))]


@pytest.fixture
def fleet(tmp_path: Path, pg: PostgresServer, db: str) -> Iterator[Fleet]:
    made = Fleet(tmp_path, pg, db)
    made.cluster.start()
    try:
        yield made
    finally:
        made.cluster.stop()


def test_application_rows_are_routable_and_routed_writes_insert_rows(fleet: Fleet) -> None:
    router = fleet.cluster.router()
    fleet.wait_all_routed()
    fleet.sql("INSERT INTO harvest SELECT 'crate-' || g, 'dulse' FROM generate_series(1, 300) g")
    fleet.sql("DELETE FROM harvest WHERE tag LIKE 'bed-1%'")
    fleet.sql("UPDATE harvest SET tag = 'moved-2' WHERE tag = 'bed-2'")
    fleet.wait_all_routed()
    fleet.wait_counted()

    reply = router.Write(routing_pb2.WriteRequest(key=b"crate-new", value=b"laver 7 kg", node_id=AGENT), timeout=15)
    assert reply.created and fleet.sql("SELECT note FROM harvest WHERE tag = 'crate-new'") == [("laver 7 kg",)]
    read = router.Read(routing_pb2.ReadRequest(key=b"crate-new"), timeout=10)
    assert read.found and read.value == b"laver 7 kg" and read.node_id == AGENT
    removed = router.Remove(routing_pb2.RemoveRequest(key=b"crate-new"), timeout=15)
    assert AGENT in removed.node_ids and fleet.sql("SELECT 1 FROM harvest WHERE tag = 'crate-new'") == []


def test_rows_written_while_the_agent_is_down_arrive_without_a_listing(fleet: Fleet) -> None:
    fleet.wait_counted()
    before = fleet.status()
    fleet.cluster.stop_node(AGENT)
    fleet.sql("INSERT INTO harvest SELECT 'away-' || g, 'dulse' FROM generate_series(1, 250) g")
    fleet.sql("DELETE FROM harvest WHERE tag IN ('bed-1', 'bed-2', 'bed-3')")
    fleet.cluster.start_node(AGENT)
    fleet.cluster.wait_node_state(AGENT, lambda n: n.epoch > before.epoch and n.state == "fresh", 30, "new epoch")
    fleet.wait_all_routed()
    fleet.wait_counted()
    figures = scrape(fleet.metrics_port)
    assert figures["shardsieve_agent_listings_total"] == 0             # the slot resumed: no listing
    assert figures["shardsieve_agent_keys_counted_total"] == 250        # only the rows written meanwhile
    assert figures["shardsieve_agent_keys_uncounted_total"] == 3


def test_truncate_empties_the_filter_through_the_daemon(fleet: Fleet) -> None:
    fleet.wait_counted()
    fleet.sql("TRUNCATE harvest")
    wait_until(lambda: fleet.status().key_count == 0, 20, message="the truncated rows uncounted")
    fleet.sql("INSERT INTO harvest VALUES ('after-truncate', 'laver')")
    fleet.wait_all_routed()
    fleet.wait_counted()


def test_a_lost_slot_relists_the_table_under_a_new_epoch(fleet: Fleet) -> None:
    from shardsieve.node.adapters.postgres_store import drop_agent_slots

    fleet.wait_counted()
    before = fleet.status()
    (slot,) = fleet.slots()
    wait_until(lambda: drop_agent_slots(fleet.url, AGENT), 20, message="the agent's slot dropped")
    fleet.sql("INSERT INTO harvest SELECT 'gap-' || g, 'dulse' FROM generate_series(1, 100) g")
    fleet.cluster.wait_node_state(AGENT, lambda n: n.epoch > before.epoch and n.state == "fresh", 30, "new epoch")
    fleet.wait_all_routed()
    fleet.wait_counted()
    figures = scrape(fleet.metrics_port)
    assert figures["shardsieve_agent_feed_breaks_total"] >= 1
    assert figures["shardsieve_agent_rebuilds_after_break_total"] >= 1
    assert figures["shardsieve_agent_listings_total"] >= 2              # the first one and the relisting
    assert fleet.slots() and slot not in fleet.slots()                  # a new slot


def test_agent_retire_asks_then_drops_the_slot_and_publication(fleet: Fleet) -> None:
    fleet.wait_counted()
    fleet.cluster.stop_node(AGENT)
    assert fleet.slots()
    argv = shardsieve_argv("agent-retire", "--store", fleet.url, "--id", AGENT)
    refused = subprocess.run(argv, capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=60)
    assert refused.returncode == 2 and "--yes" in refused.stderr and len(refused.stderr.strip().splitlines()) == 1
    assert fleet.slots()                                                 # nothing removed
    done = subprocess.run([*argv, "--yes"], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert fleet.slots() == []
    assert fleet.sql("SELECT 1 FROM pg_publication") == []
    again = subprocess.run([*argv, "--yes"], capture_output=True, text=True, timeout=60)
    assert again.returncode == 0 and "nothing to remove" in again.stdout


def test_a_table_the_agent_cannot_follow_exits_4_with_one_line(pg: PostgresServer, db: str, tmp_path: Path) -> None:
    url = pg.url(db, ROLE, table="no_such_table", key="tag")
    argv = shardsieve_argv("agent", "--id", "salt-shed", "--store", url, "--listen", f"127.0.0.1:{free_port()}",
                           "--state-dir", str(tmp_path / "state"), "--allow-plaintext", "true")
    done = subprocess.run(argv, capture_output=True, text=True, timeout=60)
    assert done.returncode == 4, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "no_such_table" in lines[0]


def test_mutual_tls_stats_and_an_operator_rebuild_work_as_for_a_node(pg: PostgresServer, db: str,
                                                                      tmp_path: Path) -> None:
    """Security, stats and rebuilds are the node's whatever the store: the agent serves and
    syncs over mutual TLS with its own certificate (common name = its node id, docs/security.md),
    refuses plaintext, reports its stats, and an operator's resize through the coordinator's
    Admin API ends in a verified new epoch of the asked capacity with every row still routed."""
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    from shardsieve.cli.certs import make_dev_pki
    from shardsieve.v1 import admin_pb2, storage_pb2

    pki = tmp_path / "pki"
    make_dev_pki(pki, ["node-1", AGENT])
    url = pg.url(db, ROLE, table="harvest", key="tag", value="note")
    with LocalCluster(tmp_path / "fleet", nodes=1, capacity=5000, tls_dir=pki, heartbeat_ms=200,
                      extra_coordinator_args=["--auto-rebuild", "false"], agents={AGENT: ["--store", url]}) as cluster:
        keys = sorted(str(r[0]).encode() for r in pg.execute("SELECT tag FROM harvest", dbname=db))
        wait_until(lambda: not not_routed_to(cluster.router(), keys, AGENT), 20, message="rows routed over TLS")
        read = cluster.router().Read(routing_pb2.ReadRequest(key=b"bed-7"), timeout=10)
        assert read.found and read.value == b"sugar-kelp" and read.node_id == AGENT
        with grpc.insecure_channel(cluster.node_handles[AGENT].address) as plain:
            with pytest.raises(grpc.RpcError) as refused:
                health_pb2_grpc.HealthStub(plain).Check(health_pb2.HealthCheckRequest(), timeout=3)
        assert refused.value.code() == grpc.StatusCode.UNAVAILABLE          # no TLS, no answer
        stats = cluster.storage(AGENT).Stats(storage_pb2.NodeStatsRequest(), timeout=5).stats
        assert stats.key_count == len(keys) and stats.capacity == 5000

        before = next(n for n in cluster.fleet_status().nodes if n.node_id == AGENT)
        cluster.admin().Rebuild(admin_pb2.RebuildCommand(node_ids=[AGENT], capacity=20_000), timeout=10,
                                metadata=cluster.auth_metadata())
        after = cluster.wait_node_state(AGENT, lambda n: n.epoch > before.epoch and n.state == "fresh"
                                        and n.capacity == 20_000, 30, "the resized epoch verified")
        assert after.key_count == len(keys)
        assert not not_routed_to(cluster.router(), keys, AGENT)
