"""The PostgreSQL agent against a real PostgreSQL 15 (Debian package) on loopback.

The server runs as an unprivileged user when the tests run as root (see
shardsieve.testing.servers). Oracle (shardsieve.testing.agent_oracle): the keys the table
really holds (SELECT after the feed settled) as a plain Bloom filter, covered by and equal
to the agent's filter. PostgreSQL behaviour relied on: an exported snapshot of a new slot
sees exactly the transactions before its consistent point and the slot streams the ones
after (docs, "Logical Decoding Concepts", "Exported Snapshots"); a slot keeps the changes
after its confirmed position across disconnects (docs, "Replication Slots").
"""

from __future__ import annotations

import itertools
import threading
from pathlib import Path
from typing import Iterator

import pytest

from shardsieve.node.adapters.applier import FeedApplier, start_agent
from shardsieve.node.adapters.ledger import open_ledger
from shardsieve.node.core import NodeCore
from shardsieve.node.store import StoreError
from shardsieve.testing.agent_oracle import assert_filter_matches
from shardsieve.testing.procs import wait_until
from shardsieve.testing.servers import PostgresServer, harvest_database, start_postgres

pytestmark = pytest.mark.cluster
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
    name = harvest_database(pg, f"kelp_{next(_databases)}", ROLE)
    return name


class Agent:
    def __init__(self, pg: PostgresServer, db: str, state_dir: Path, table: str = "harvest", key: str = "tag",
                 value: str | None = "note", batch: int = 2000) -> None:
        from shardsieve.node.adapters.postgres_store import PostgresStore

        query = {"table": table, "key": key, **({"value": value} if value else {})}
        self.url = pg.url(db, ROLE, **query)
        self.external = PostgresStore(self.url, node_id="gullrock-ledger", batch=batch)
        self.ledger = open_ledger("sqlite", state_dir)
        self.core: NodeCore
        self.applier: FeedApplier
        self.core, self.applier = start_agent("gullrock-ledger", self.external, self.ledger, capacity=50_000,
                                              target_fpr=0.01, background_rebuild=False)

    def close(self) -> None:
        self.applier.stop()
        self.external.close()
        self.ledger.close()


def table_keys(pg: PostgresServer, db: str, sql: str = "SELECT tag FROM harvest") -> set[bytes]:
    return {str(r[0]).encode() for r in pg.execute(sql, dbname=db)}


@pytest.fixture
def agents() -> Iterator[list[Agent]]:
    made: list[Agent] = []
    yield made
    for agent in made:
        agent.close()


def test_rows_before_and_during_the_first_listing(pg: PostgresServer, db: str, tmp_path: Path,
                                                  agents: list[Agent]) -> None:
    pg.execute("INSERT INTO harvest SELECT 'bed-' || g, 'sugar-kelp' FROM generate_series(1, 5000) g", dbname=db)
    stop = threading.Event()

    def writer() -> None:
        for i in itertools.count():
            if stop.is_set():
                return
            pg.execute("INSERT INTO harvest VALUES (%s, 'dulse')", (f"crate-{i}",), dbname=db)
            pg.execute("DELETE FROM harvest WHERE tag = %s", (f"bed-{i + 1}",), dbname=db)
            pg.execute("UPDATE harvest SET tag = %s WHERE tag = %s", (f"moved-{i}", f"bed-{i + 2500}"), dbname=db)

    thread = threading.Thread(target=writer)
    thread.start()
    try:
        agents.append(agent := Agent(pg, db, tmp_path, batch=50))
    finally:
        stop.set()
        thread.join()
    agent.applier.settle(30.0)
    assert_filter_matches(agent.core, table_keys(pg, db))
    assert agent.applier.counters.listings == 1


def test_changes_made_while_the_agent_is_down_arrive_when_it_returns(pg: PostgresServer, db: str,
                                                                     tmp_path: Path, agents: list[Agent]) -> None:
    pg.execute("INSERT INTO harvest SELECT 'bed-' || g, 'n' FROM generate_series(1, 1000) g", dbname=db)
    agents.append(first := Agent(pg, db, tmp_path))
    first.applier.settle()
    epoch = first.core.epoch
    first.close()
    agents.clear()
    pg.execute("INSERT INTO harvest SELECT 'crate-' || g, 'n' FROM generate_series(1, 300) g", dbname=db)
    pg.execute("DELETE FROM harvest WHERE tag IN ('bed-1', 'bed-2', 'bed-3')", dbname=db)
    pg.execute("UPDATE harvest SET tag = 'bed-renamed' WHERE tag = 'bed-4'", dbname=db)
    held = pg.execute("SELECT pg_wal_lsn_diff(pg_current_wal_lsn(), confirmed_flush_lsn) "
                      "FROM pg_replication_slots", dbname=db)
    assert held and held[0][0] > 0, "the slot keeps the changes made while the agent is down"
    agents.append(second := Agent(pg, db, tmp_path))
    assert second.applier.counters.listings == 0, "resumed from the slot, no listing"
    assert second.core.epoch > epoch
    second.applier.settle()
    assert_filter_matches(second.core, table_keys(pg, db))
    wait_until(lambda: pg.execute("SELECT pg_wal_lsn_diff(pg_current_wal_lsn(), confirmed_flush_lsn) < 1000000 "
                                  "FROM pg_replication_slots", dbname=db)[0][0], 20.0,
               message="the slot's confirmed position caught up")


def test_truncate_key_updates_deletes_and_routed_writes(pg: PostgresServer, db: str, tmp_path: Path,
                                                        agents: list[Agent]) -> None:
    pg.execute("INSERT INTO harvest SELECT 'bed-' || g, 'n' FROM generate_series(1, 200) g", dbname=db)
    agents.append(agent := Agent(pg, db, tmp_path))
    pg.execute("UPDATE harvest SET tag = 'bed-one' WHERE tag = 'bed-1'", dbname=db)     # key column update
    pg.execute("UPDATE harvest SET note = 'oarweed' WHERE tag = 'bed-2'", dbname=db)    # not a key change
    pg.execute("DELETE FROM harvest WHERE tag = 'bed-3'", dbname=db)
    stamp = agent.applier.write([(b"order-9", b"laver")])
    assert stamp.epoch == agent.core.epoch
    with agent.core.lock:
        assert agent.core.sync is not None and agent.core.sync.filter.contains(b"order-9")
    assert agent.external.get_many([b"order-9", b"bed-2", b"bed-3"]) == [b"laver", b"oarweed", None]
    agent.applier.settle()
    assert_filter_matches(agent.core, table_keys(pg, db))
    pg.execute("TRUNCATE harvest", dbname=db)
    pg.execute("INSERT INTO harvest VALUES ('after-truncate', 'n')", dbname=db)
    agent.applier.settle()
    assert agent.ledger.count() == 1
    assert_filter_matches(agent.core, {b"after-truncate"})


def test_a_lost_slot_means_a_new_slot_and_a_fresh_listing(pg: PostgresServer, db: str, tmp_path: Path,
                                                          agents: list[Agent]) -> None:
    pg.execute("INSERT INTO harvest SELECT 'bed-' || g, 'n' FROM generate_series(1, 100) g", dbname=db)
    agents.append(first := Agent(pg, db, tmp_path))
    first.close()
    agents.clear()
    pg.execute("SELECT pg_drop_replication_slot(slot_name) FROM pg_replication_slots", dbname=db)
    pg.execute("DELETE FROM harvest WHERE tag LIKE 'bed-1%'", dbname=db)
    agents.append(second := Agent(pg, db, tmp_path))
    assert second.applier.counters.listings == 1
    second.applier.settle()
    assert_filter_matches(second.core, table_keys(pg, db))


def test_drop_agent_slots_removes_the_slot_and_publication_even_while_streaming(
        pg: PostgresServer, db: str, tmp_path: Path, agents: list[Agent]) -> None:
    from shardsieve.node.adapters.postgres_store import drop_agent_slots

    agents.append(agent := Agent(pg, db, tmp_path))
    wait_until(lambda: pg.execute("SELECT bool_or(active) FROM pg_replication_slots", dbname=db)[0][0], 20.0,
               message="the slot is in use")
    dropped = drop_agent_slots(agent.url, "gullrock-ledger")
    assert "shardsieve_gullrock_ledger" in dropped and len(dropped) == 2
    agent.close()
    agents.clear()
    assert pg.execute("SELECT count(*) FROM pg_replication_slots", dbname=db)[0][0] == 0
    assert pg.execute("SELECT count(*) FROM pg_publication", dbname=db)[0][0] == 0


def test_integer_keys_and_whole_row_values(pg: PostgresServer, db: str, tmp_path: Path,
                                           agents: list[Agent]) -> None:
    pg.execute("CREATE TABLE crates (id bigint PRIMARY KEY, farm text)", dbname=db)
    pg.execute(f"ALTER TABLE crates OWNER TO {ROLE}", dbname=db)
    pg.execute("INSERT INTO crates SELECT g, 'mistbank' FROM generate_series(1, 50) g", dbname=db)
    agents.append(agent := Agent(pg, db, tmp_path, table="crates", key="id", value=None))
    pg.execute("UPDATE crates SET id = 500 WHERE id = 5", dbname=db)
    agent.applier.settle()
    assert_filter_matches(agent.core, table_keys(pg, db, "SELECT id FROM crates"))
    assert agent.external.get_many([b"500", b"5", b"0500"]) == [b'{"id":500,"farm":"mistbank"}', None, None]


def test_set_up_problems_are_refused_with_the_fix(pg: PostgresServer, db: str) -> None:
    from shardsieve.node.adapters.postgres_store import PostgresStore

    pg.execute("CREATE TABLE tide_log (entry text NOT NULL, note text)", dbname=db)
    pg.execute("CREATE UNIQUE INDEX tide_log_entry ON tide_log (entry)", dbname=db)
    url = pg.url(db, ROLE, table="tide_log", key="entry")
    with pytest.raises(StoreError, match="REPLICA IDENTITY FULL"):
        PostgresStore(url, node_id="n1")
    with pytest.raises(StoreError, match="not unique on its own"):
        PostgresStore(pg.url(db, ROLE, table="tide_log", key="note"), node_id="n1")
    pg.execute("CREATE ROLE kelp_reader LOGIN", dbname=db)
    with pytest.raises(StoreError, match="lacks REPLICATION"):
        PostgresStore(pg.url(db, "kelp_reader", table="harvest", key="tag"), node_id="n1")
    with pytest.raises(StoreError, match="needs \\?table="):
        PostgresStore(pg.url(db, ROLE), node_id="n1")
